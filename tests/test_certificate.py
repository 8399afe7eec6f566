"""Certificate format meterlink-cert/1: validation, one-line errors, status, dump/load round trip."""

import dataclasses
import datetime as dt

import pytest
from hypothesis import given, settings
from hypothesis import strategies as st

from meterlink.physics.calibrate import identity_certificate
from meterlink.physics.certificate import (AxisCalibration, DipoleCertificate, ProbeCertificate, certificate_status,
                                   dump_certificate, load_certificate, packaged_certificates,
                                   parse_certificate)
from meterlink.errors import CertificateError
from meterlink.physics.uncertainty import Component


def _dipole() -> DipoleCertificate:
    us = (Component("antenna_factor", 1.0, "dB", "normal", 2.0), Component("cable_loss", 0.2, "dB", "normal", 2.0),
          Component("receiver_level", 0.5, "dB", "rectangular"), Component("mismatch", 5.0, "%", "u-shaped"))
    return DipoleCertificate("D-1", "S1", "R-1", "S2", "Test lab", "T-1", dt.date(2026, 1, 2), dt.date(2027, 1, 2),
                             (8e7, 1e9), (-10.0, 120.0), (8e7, 3e8, 1e9), (8.1, 18.0, 28.4),
                             (8e7, 1e9), (0.3, 1.4), -0.25, us)


def _write(tmp_path, text, name="cert.toml"):
    p = tmp_path / name
    p.write_text(text, encoding="utf-8")
    return p


def test_probe_and_dipole_round_trip(tmp_path):
    for cert in (identity_certificate(), _dipole()):
        text = dump_certificate(cert)
        assert parse_certificate(text) == cert
        loaded = load_certificate(_write(tmp_path, text))
        assert loaded == cert and loaded.source.endswith("cert.toml")


def _probe_text():
    return dump_certificate(identity_certificate())


BROKEN = [
    # (edit to the valid text, words the message must contain)
    (lambda t: t.replace('format = "meterlink-cert/1"', 'format = "meterlink-cert/9"'), "unsupported format"),
    (lambda t: t.replace('serial = "none"\n', ""), "missing key 'device.serial'"),
    (lambda t: t.replace("date = 2000-01-01", 'date = "2000-02-30"'), "not a date"),
    (lambda t: t.replace("date = 2000-01-01", "date = 2000-01-01T10:00:00"), "must be a date"),
    (lambda t: t.replace("due = 9999-01-01", "due = 1999-01-01"), "is not after calibration date"),
    (lambda t: t.replace("\nv_per_m = [0.1, 0.3", "\nv_per_m = [0.1, 0.05", 1), "not strictly increasing"),
    (lambda t: t.replace("freq_hz = [100000000.0, 6000000000.0]\ncorrection_db = [0.0, 0.0]",
                         "freq_hz = [100000000.0, 6000000000.0]\ncorrection_db = [0.0, 0.0, 0.0]", 1), "differ in length"),
    (lambda t: t.replace('distribution = "normal"', 'distribution = "gaussian-ish"', 1), "distribution"),
    (lambda t: t.replace("[uncertainty.linearity]", "[uncertainty.linearityy]"),
     "missing key 'uncertainty.linearity'"),
    (lambda t: t.replace("k = 2.0", "", 1), "missing key 'uncertainty.reference_field.k'"),
    (lambda t: t.replace('kind = "isotropic-probe"', 'kind = "thermometer"'), "unknown kind"),
    (lambda t: t.replace("[reference]\nfreq_hz = 1000000000.0", "[reference]\nfreq_hz = 9e9"), "reference frequency"),
    (lambda t: t.replace("level_v_per_m = [0.1, 300.0]", "level_v_per_m = [0.1, 900.0]"), "does not cover"),
    (lambda t: t.replace("deviation_db = 0.0", 'deviation_db = "small"'), "must be a finite number"),
    (lambda t: t + "\n[broken", "not valid TOML"),
    (lambda t: t.replace("[axis.z]", "[axis.w]"), "unknown axis"),
]


@pytest.mark.parametrize("edit,words", BROKEN)
def test_broken_files_give_one_line_error_naming_file(tmp_path, edit, words):
    text = edit(_probe_text())
    assert text != _probe_text()
    path = _write(tmp_path, text, "broken-probe.toml")
    with pytest.raises(CertificateError) as ei:
        load_certificate(path)
    msg = str(ei.value)
    assert "\n" not in msg
    assert msg.startswith(str(path) + ": ")
    assert words in msg


def test_missing_file_and_unknown_name(tmp_path):
    with pytest.raises(CertificateError, match="nope.toml: no such certificate file"):
        load_certificate(tmp_path / "nope.toml")
    with pytest.raises(CertificateError, match="no-such-cert: no such certificate"):
        load_certificate("no-such-cert")


def test_packaged_certificates_load_by_name():
    names = packaged_certificates()
    assert {"demo-probe", "demo-dipole"} <= set(names)
    probe, dipole = load_certificate("demo-probe"), load_certificate("demo-dipole")
    assert isinstance(probe, ProbeCertificate) and isinstance(dipole, DipoleCertificate)
    assert probe.cal_date == dt.date(2026, 6, 15) and probe.due_date == dt.date(2027, 6, 15)
    # what is committed is exactly what the writer produces for it (diff-friendly, canonical)
    assert parse_certificate(dump_certificate(probe)) == probe


def test_certificate_status():
    c = _dipole()
    assert certificate_status(c, dt.date(2026, 6, 1)) == []
    soon = certificate_status(c, dt.date(2026, 12, 20))
    assert len(soon) == 1 and "is due on 2027-01-02" in soon[0]
    expired = certificate_status(c, dt.date(2027, 1, 3))
    assert len(expired) == 1 and "expired on 2027-01-02" in expired[0] and "T-1" in expired[0]
    assert "after" in certificate_status(c, dt.date(2025, 1, 1))[0]


# --- hypothesis: dump/load round trip over generated certificates ---------------------------------

_text = st.text(st.characters(codec="utf-8", exclude_categories=("Cs",)), min_size=1, max_size=12).filter(
    lambda s: s.strip())
_num = st.floats(-50, 50, allow_nan=False, allow_infinity=False)


@st.composite
def _increasing(draw, n, lo=1e-3, hi=1e9):
    xs = sorted(set(draw(st.lists(st.floats(lo, hi), min_size=n, max_size=n, unique=True))))
    if len(xs) < 2:
        xs = [lo, hi]
    return tuple(xs)


@st.composite
def probe_certs(draw):
    fq = draw(_increasing(4, 1e6, 1e10))
    cnt = draw(_increasing(6, 1.0, 1e7))
    fld = draw(_increasing(len(cnt), 0.01, 1e3))
    axes = tuple(AxisCalibration(a, draw(_num), cnt, fld, fq, tuple(draw(_num) for _ in fq)) for a in "xyz")
    us = tuple(Component(n, draw(st.floats(0, 5)), draw(st.sampled_from(["dB", "%"])), d, 2.0 if d == "normal" else 1.0)
               for n, d in (("reference_field", "normal"), ("linearity", "rectangular"),
                            ("frequency_response", "triangular"), ("extra", "u-shaped")))
    cal = draw(st.dates(dt.date(2000, 1, 1), dt.date(2090, 1, 1)))
    return ProbeCertificate(draw(_text), draw(_text), draw(_text), draw(_text), cal,
                            cal + dt.timedelta(days=draw(st.integers(1, 3000))), draw(st.sampled_from("EH")),
                            fq[0], (fq[0], fq[-1]), (fld[0], fld[-1]), draw(_num), draw(_num),
                            draw(st.floats(0, 1)), draw(st.floats(0, 3)), axes, us)


@settings(max_examples=60, deadline=None)
@given(probe_certs())
def test_dump_load_round_trip_property(cert):
    assert parse_certificate(dump_certificate(cert)) == cert


def test_replace_keeps_validation_on_load():
    bad = dataclasses.replace(identity_certificate(), due_date=dt.date(1990, 1, 1))
    with pytest.raises(CertificateError, match="not after"):
        parse_certificate(dump_certificate(bad), "mem.toml")


def test_committed_demo_certificates_are_what_the_lab_script_derives():
    import importlib.util
    from pathlib import Path
    folder = Path(__file__).resolve().parent.parent / "calibration"
    spec = importlib.util.spec_from_file_location("derive_demo_certificates", folder / "derive_demo_certificates.py")
    mod = importlib.util.module_from_spec(spec)
    spec.loader.exec_module(mod)
    for name, text in mod.derive().items():
        assert (folder / name).read_text(encoding="utf-8") == text, f"{name}: rerun the script and commit"


def _with_range(text, rng):
    return text.replace("coefficient_halfwidth_db_per_c = ", f"range_c = {rng}\ncoefficient_halfwidth_db_per_c = ", 1)


def test_temperature_range_is_optional_validated_and_round_trips(tmp_path):
    base = _probe_text()
    assert parse_certificate(base).temp_range_c is None            # not stated: allowed, says so later
    ref = parse_certificate(base).temp_ref_c
    ok = parse_certificate(_with_range(base, f"[{ref - 10}, {ref + 10}]"))
    assert ok.temp_range_c == (ref - 10, ref + 10)
    assert parse_certificate(dump_certificate(ok)) == ok
    dip = dataclasses.replace(_dipole(), temp_range_c=(0.0, 40.0))
    assert parse_certificate(dump_certificate(dip)) == dip
    for rng, words in [(f"[{ref + 10}, {ref - 10}]", "not strictly increasing"),
                       (f"[{ref}, {ref}]", "not strictly increasing"),
                       ("[-500.0, 40.0]", "outside the plausible range"),
                       ("[0.0, nan]", "finite number"),
                       (f"[{ref - 10}]", "at least 2 numbers"),
                       (f"[{ref + 1}, {ref + 10}]", "'temperature.reference_c'"),
                       ('"warm"', "list of at least 2 numbers")]:
        path = _write(tmp_path, _with_range(base, rng), "range.toml")
        with pytest.raises(CertificateError) as ei:
            load_certificate(path)
        msg = str(ei.value)
        assert msg.startswith(str(path) + ": ") and "temperature.range_c" in msg and words in msg, (rng, msg)


def test_demo_certificates_state_the_chamber_temperature_range():
    # the range is where the lab measured the coefficient (the chamber's two temperatures): see
    # calibration/derive_demo_certificates.py; the demo site (simulators/scenarios/demo.toml) lies inside it
    for name in ("demo-probe", "demo-dipole"):
        lo, hi = load_certificate(name).temp_range_c
        assert lo < 13.0 and hi > 21.0

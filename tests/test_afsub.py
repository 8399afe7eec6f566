"""Antenna-factor calibration of the dipole by substitution (reference-antenna method).

Outside checks and where they come from:
- AF_dut = AF_ref * V_ref / V_dut: the substitution relation (the same field seen by two antennas; AF = E / V),
  worked by hand below in linear units and in dB.
- Budget arithmetic: JCGM 100:2008 5.1.2 eq. (10) (uncorrelated inputs: u_c^2 = sum (c_i u(x_i))^2), 5.1.3
  (a model that is a sum: c_i = +/-1), 4.2.3 (experimental standard deviation of the mean), 4.3.7 (rectangular
  half-width a: u = a / sqrt(3)), 6.2.1 eq. (18) (U = k u_c); U-shaped mismatch a / sqrt(2) (JCGM 101:2008 6.4.6)
  with a = 20 log10(1 + |G_a||G_b|). Every value hand-worked below with the arithmetic shown.
- End to end over loopback TCP with pyvisa-py: the simulated bench (invented values) knows both antennas' true
  antenna factors; the substituted AF must come within its stated U of the truth.
"""

from __future__ import annotations

import math

import pytest

from meterlink.lab import afcal
from meterlink.lab.session import LabError
from meterlink.physics.antenna_cal import (SubBudgetInputs, SubReading, sub_budget, sub_point,
                                           substitution_af_db_per_m)
from meterlink.simulators.scpi_afcal import REF_AF_ERROR_DB, AfRig


def test_substitution_relation_hand_worked():
    # AF_ref = 20.00 dB/m = 10 (1/m). V_ref -40.0 dBm, V_dut -42.5 dBm at the same net power:
    # V_ref / V_dut = 10^(2.5/20) = 1.333521 -> AF_dut = 10 * 1.333521 = 13.33521 1/m = 22.50 dB/m
    af = float(substitution_af_db_per_m(20.0, -40.0, -42.5))
    assert af == pytest.approx(22.5, abs=1e-12)
    assert 10 ** (af / 20) == pytest.approx(10 * 1.333521, rel=1e-6)
    # the field 0.1 dB stronger for the antenna under test (net power 10.1 against 10.0 dBm): its voltage is
    # referred down by 0.1 dB -> AF_dut = 20 + (-40 - 10) - (-42.5 - 10.1) = 22.60 dB/m
    assert float(substitution_af_db_per_m(20.0, -40.0, -42.5, 10.0, 10.1)) == pytest.approx(22.6, abs=1e-12)


def test_sub_point_from_repeats_hand_worked():
    rs = [SubReading(1e9, 1, 10.0, -40.0, 10.0, -42.4), SubReading(1e9, 2, 10.0, -40.1, 10.0, -42.6),
          SubReading(1e9, 3, 10.0, -40.0, 10.05, -42.45)]
    # ratios: 2.4, 2.5, (-40 - 10) - (-42.45 - 10.05) = 2.5 -> AF 22.4, 22.5, 22.5 (AF_ref 20.0)
    # mean 22.466667; s = sqrt(((-.066667)^2 + 2 (.033333)^2) / 2) = sqrt(0.006667/2) = 0.057735; s/sqrt(3) = 0.033333
    p = sub_point(rs, 20.0)
    assert p.af_db_per_m == pytest.approx(22.466667, abs=1e-6) and p.n == 3
    assert p.u_a_db == pytest.approx(0.033333, abs=1e-6)
    assert p.power_change_db == pytest.approx(0.05, abs=1e-12)


def test_budget_hand_worked_against_jcgm_100():
    rs = [SubReading(1e9, 1, 10.0, -40.0, 10.0, -42.4), SubReading(1e9, 2, 10.0, -40.1, 10.0, -42.6),
          SubReading(1e9, 3, 10.0, -40.0, 10.05, -42.45)]
    b, notes = sub_budget(sub_point(rs, 20.0), SubBudgetInputs())
    # reference AF 0.6 (k = 2)                        -> 0.300000
    # repeatability (Type A, 4.2.3, above)             -> 0.033333
    # positioning 0.3 rectangular (4.3.7)              -> 0.3 / 1.732051 = 0.173205
    # mismatch ref: 20 log10(1 + 0.2 * 0.1) = 0.172003 -> / 1.414214 = 0.121625
    # mismatch dut: 20 log10(1 + 0.3 * 0.1) = 0.256744 -> / 1.414214 = 0.181546
    # analyser linearity 0.1 rectangular               -> 0.057735
    # power normalisation 0.02 rectangular             -> 0.011547
    # u_c^2 = 0.09 + 0.001111 + 0.03 + 0.014793 + 0.032959 + 0.003333 + 0.000133 = 0.172329 (5.1.2 eq. 10)
    # u_c = 0.415126; U = 2 u_c = 0.830251 (6.2.1 eq. 18)
    want = [0.300000, 0.033333, 0.173205, 0.121625, 0.181546, 0.057735, 0.011547]
    assert [r.u_db for r in b.rows] == pytest.approx(want, abs=2e-6)
    assert b.u_c_db == pytest.approx(0.415126, abs=2e-6)
    assert b.u_expanded_db == pytest.approx(0.830251, abs=4e-6)
    assert len(notes) == len(b.rows) and "cancels" in notes[5]
    with pytest.raises(ValueError, match="unknown budget input"):
        SubBudgetInputs().replace({"cable_db": 0.1})


def _bench(rig, tmp_path, freqs=(300e6, 1e9, 3e9)):
    path = tmp_path / "b.toml"
    path.write_text(rig.bench_toml(freqs_hz=freqs), encoding="utf-8")
    return afcal.load_af_bench(path), afcal.load_substitution(path)


def test_substitution_over_scpi_within_u_of_the_truth(tmp_path):
    with AfRig(seed=4) as rig:
        bench, sub = _bench(rig, tmp_path)
        phases = []

        def swap(phase):
            phases.append(phase)
            rig.swap(phase)
        journal = afcal.SubJournal(tmp_path / "j.csv")
        readings = afcal.run_substitution(bench, sub, journal, swap, repeats=2)
        journal.close()
        assert rig.gen.on is False
        truth = {f: float(rig.true_af_db_per_m(f)) for f in bench.freq_hz}
    assert phases == ["reference", "dut"]
    lines = (tmp_path / "j.csv").read_text(encoding="utf-8").splitlines()
    assert lines[0] == "antenna,freq_hz,repeat,net_before_dbm,net_after_dbm,analyser_dbm" and len(lines) == 1 + 12
    assert [(r.freq_hz, r.repeat) for r in readings] == [(f, i) for f in bench.freq_hz for i in (1, 2)]
    errs = []
    for f in bench.freq_hz:
        p = sub_point([r for r in readings if r.freq_hz == f], float(sub.ref_af_db_per_m(f)))
        b, _ = sub_budget(p, SubBudgetInputs())
        errs.append(p.af_db_per_m - truth[f])
        assert abs(errs[-1]) <= b.u_expanded_db, (f, errs[-1], b.u_expanded_db)
    # the reference antenna's own error (its true AF is REF_AF_ERROR_DB off its certificate) passes into the
    # result with the opposite sign: the mean error is -REF_AF_ERROR_DB within the analyser's scatter (0.05 dB rms
    # a sweep: about 0.03 dB on the mean of 3 frequencies x 2 repeats x 2 antennas)
    assert sum(errs) / len(errs) == pytest.approx(-REF_AF_ERROR_DB, abs=0.1)


def test_substitution_bench_mistakes_are_one_line_before_any_rf(tmp_path):
    with AfRig() as rig:
        text = rig.bench_toml(freqs_hz=(300e6, 1e9))
        # the reference antenna's table starting at 400 MHz: 300 MHz is in the far field and the bench's other
        # tables, but not in the reference antenna's
        (tmp_path / "b.toml").write_text(text.replace("ref_af_freq_hz = [200000000.0", "ref_af_freq_hz = [4e8"),
                                         encoding="utf-8")
        bench, sub = afcal.load_af_bench(tmp_path / "b.toml"), afcal.load_substitution(tmp_path / "b.toml")
        journal = afcal.SubJournal(tmp_path / "j.csv")
        with pytest.raises(LabError, match="outside the reference antenna's table") as e:
            afcal.run_substitution(bench, sub, journal, rig.swap, repeats=2)
        journal.close()
        assert "\n" not in str(e.value) and rig.analyser.sweeps == 0
        (tmp_path / "n.toml").write_text(text.split("[substitution]")[0], encoding="utf-8")
        with pytest.raises(LabError, match=r"\[substitution\] table"):
            afcal.load_substitution(tmp_path / "n.toml")
        (tmp_path / "m.toml").write_text(text.replace("ref_af_db_per_m = [", "ref_af_db_per_m = [1.0, "),
                                         encoding="utf-8")
        with pytest.raises(LabError, match="same length"):
            afcal.load_substitution(tmp_path / "m.toml")
    assert math.isfinite(REF_AF_ERROR_DB)


def test_cli_substitution_certificate_states_the_method(tmp_path, capsys):
    """lab run dipole-af --method substitution on the simulated bench -> the certificate the host loads, its page
    stating the method and the reference antenna; AF within the stated U of the simulator's truth."""
    import json

    import numpy as np

    from meterlink.cli import main
    from meterlink.physics.certificate import load_certificate

    out = tmp_path / "o"
    assert main(["lab", "run", "dipole-af", "--method", "substitution", "--quick", "--repeats", "2", "--json",
                 "--out", str(out)]) == 0
    summary = json.loads(capsys.readouterr().out)
    assert summary["method"] == "substitution"
    cert = load_certificate(out / "certificate.toml")
    f = np.array(cert.af_freq_hz)
    u = np.array([p["u_expanded_db"] for p in summary["points"]])
    err = np.array(cert.af_db_per_m) - AfRig().true_af_db_per_m(f)
    assert np.all(np.abs(err) <= u) and cert.uncertainties[0].value >= u.max()
    html = (out / "certificate.html").read_text(encoding="utf-8")
    assert "substitution: a reference antenna" in html and "REF-AF-0001 (invented)" in html
    assert "positioning" in html and "mismatch, antenna under test" in html
    assert "by substitution against a reference antenna" in html and "standard-field" not in html
    lines = (out / "af-journal.csv").read_text(encoding="utf-8").splitlines()
    assert len(lines) == 1 + 2 * 2 * len(f) and {ln.split(",")[0] for ln in lines[1:]} == {"reference", "dut"}
    # the journal alone makes the same certificate again (lab import knows a substitution journal by its header)
    assert main(["lab", "import", str(out / "af-journal.csv"), "--af-bench", str(out / "simulated-bench.toml"),
                 "--json", "--out", str(tmp_path / "imported")]) == 0
    again = json.loads(capsys.readouterr().out)
    assert again["method"] == "substitution"
    assert load_certificate(tmp_path / "imported" / "certificate.toml").af_db_per_m == cert.af_db_per_m
    assert (tmp_path / "imported" / "af-journal.csv").read_text(encoding="utf-8").splitlines() == lines


def test_method_belongs_to_dipole_af(capsys):
    from meterlink.cli import main

    assert main(["lab", "run", "--method", "substitution", "--quick"]) == 2
    err = capsys.readouterr().err.strip().splitlines()
    assert len(err) == 1 and "belongs to dipole-af" in err[0]


def test_cli_substitution_bench_failure_keeps_the_readings(tmp_path, capsys, monkeypatch):
    """A real bench (--bench): the operator is asked to mount each antenna (RF off); the power meter starts
    reporting SCPI errors part-way through the antenna under test: one line, RF off, every reading kept with
    exact counts."""
    import json

    from meterlink.cli import main

    prompts = []
    monkeypatch.setattr("builtins.input", lambda text="": prompts.append(text) or "")
    with AfRig(seed=5) as rig:
        bench = tmp_path / "b.toml"
        bench.write_text(rig.bench_toml(freqs_hz=(300e6, 1e9, 3e9)), encoding="utf-8")
        real, reads = rig.pm.command, []

        def command(h, arg, query):     # per frequency 5 reads (1 to set the field, 2 per repeat): errors after 20
            if h == "READ" and query:
                reads.append(1)
                if len(reads) >= 20:
                    rig.pm.faults.scpi_error = True
            return real(h, arg, query)
        rig.pm.command = command
        rig.swap("reference")           # what is mounted is the operator's doing: the prompt is answered here
        out = tmp_path / "o"
        code = main(["lab", "run", "dipole-af", "--method", "substitution", "--bench", str(bench), "--repeats", "2",
                     "--out", str(out)])
        assert rig.gen.on is False
    err = capsys.readouterr().err.strip()
    assert code == 2 and "\n" not in err and "readings measured, kept in" in err
    assert len(prompts) == 2 and "reference antenna" in prompts[0] and "under calibration" in prompts[1]
    assert all(p.startswith("RF is off") for p in prompts)
    lines = (out / "af-journal.csv").read_text(encoding="utf-8").splitlines()[1:]
    ev = json.loads((out / "partial-event.json").read_text())
    # the reference antenna at 3 frequencies x 2 repeats, then the antenna under test at the first frequency
    assert [ln.split(",")[0] for ln in lines] == ["reference"] * 6 + ["dut"] * 2
    assert ev["readings_measured"] == 8 and ev["readings_not_measured"] == 4
    assert not (out / "certificate.toml").exists()

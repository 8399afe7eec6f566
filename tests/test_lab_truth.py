"""Synthetic truth: the simulator's lab mode applies known fields to a probe with known imperfections."""

import bisect
import datetime as dt
import json
import math

import numpy as np
import pytest

from meterlink.physics.calibrate import calibrate_axes, linearise
from meterlink.physics.certificate import dump_certificate, load_certificate
from meterlink.lab import certify
from meterlink.lab import procedures as pr
from meterlink.lab.meter import MeterBench
from meterlink.lab.session import LabError, LabSession, orientation_matrix
from meterlink.device.link import MeterLink
from meterlink.simulators.instruments import axis_gain_db, detector_counts_float
from meterlink.simulators.lab import InProcessLab, LabMeter

FIELD_ERROR_DB = 0.2   # the bench's field-standard error, unknown to the lab
SESSION = LabSession("ML-EP3 (simulated)", "EP-4417", "Test lab (invented)", "LAB-T1", dt.date(2027, 6, 1),
                     dt.date(2028, 6, 1))


@pytest.fixture(scope="module")
def lab_run():
    lab = InProcessLab(field_error_db=FIELD_ERROR_DB, seed=11)
    res = pr.run_plan(pr.full_plan(SESSION, iso_freqs=(1e9, 2.45e9)), lab, repeats=5)
    return lab, res, certify.analyse(SESSION, res)


def test_per_axis_factors_recovered_within_u(lab_run):
    lab, _, cal = lab_run
    model, u = lab.scenario.probe, cal.budget.u_expanded_db
    f = cal.response.freq_hz
    # the probe's true correction is minus its gain change against the reference frequency
    truth = -(axis_gain_db(model, f) - axis_gain_db(model, model.ref_freq_hz))
    err = cal.response.cf_axes_db - truth
    assert np.max(np.abs(err)) <= u
    assert np.max(np.abs(err)) < 0.05          # and in fact far inside it (noise only)
    assert np.abs(truth).max() > 0.5            # the probe really has a response to recover
    # the total factor, field along the handle, is the power mean of the three axes' factors
    tot_truth = 1 / np.sqrt(np.mean(10 ** (-truth / 10), axis=1))
    assert np.allclose(cal.response.cf_total_db, 20 * np.log10(tot_truth), atol=0.05)


def test_linearity_and_detector_law_recovered(lab_run):
    lab, _, cal = lab_run
    model = lab.scenario.probe
    factor = 10 ** (FIELD_ERROR_DB / 20)
    for i, li in enumerate(cal.linearity):
        g = 10 ** (model.sensitivity_db[i] / 20) * factor
        # fitted knee in the lab's field scale: knee / (axis gain x bench error)
        assert li.fit.knee_v_per_m == pytest.approx(model.knee_v_per_m[i] / g, rel=0.03)
        assert li.fit.a_counts_per_v2m2 == pytest.approx(model.counts_per_v2m2 * g * g, rel=0.03)
        ax = cal.certificate.axes[i]
        for e, dev, ua in zip(li.levels_v_per_m, li.deviation_db, li.u_a_db):
            e_axes = np.zeros((1, 3))
            e_axes[0, i] = e * factor
            c = detector_counts_float(model, e_axes, [model.ref_freq_hz], 23.0)
            truth = 20 * math.log10(linearise(ax, [c[i]])[0][0] / e)
            assert abs(dev - truth) <= max(4 * ua, 0.01)
        assert li.max_abs_db <= cal.certificate.uncertainties[1].value


def test_isotropy_recovered_in_both_conventions(lab_run):
    lab, _, cal = lab_run
    model = lab.scenario.probe
    for iso in cal.isotropy:
        e_true = []
        for ang in iso.angles_deg:
            e_probe = (np.array([5.0, 0, 0]) * 10 ** (FIELD_ERROR_DB / 20)) @ orientation_matrix(ang, iso.tilt_deg)
            c = detector_counts_float(model, e_probe[None, :], [iso.freq_hz], 23.0)
            e_true.append(calibrate_axes(cal.certificate, c[None, :], iso.freq_hz, today=SESSION.cal_date).e_v_per_m[0])
        e_true = np.array(e_true)
        pm = float(np.max(np.abs(20 * np.log10(e_true / e_true.mean()))))
        mm = float(20 * np.log10(e_true.max() / e_true.min()))
        assert iso.plus_minus_db == pytest.approx(pm, abs=0.02)
        assert iso.max_min_db == pytest.approx(mm, abs=0.03)
        assert iso.plus_minus_db <= iso.max_min_db + 1e-12
    assert cal.certificate.isotropy_db >= max(i.plus_minus_db for i in cal.isotropy)


def test_as_found_in_tolerance_probe_gives_no_notice(lab_run):
    _, _, cal = lab_run
    again = InProcessLab(field_error_db=FIELD_ERROR_DB, seed=12)
    res = pr.run_plan(pr.full_plan(SESSION), again, repeats=5)
    cmp = certify.compare(certify.analyse(SESSION, res), cal.certificate, res)
    assert cmp.as_found == "compliant" and cmp.notice == ""
    assert max(abs(r.as_found_db) for r in cmp.rows) < 0.1
    assert "guarded acceptance" in cmp.statement and "ILAC-G8:2019" in cmp.statement


def test_as_found_drifted_probe_gives_out_of_tolerance_notice(lab_run):
    lab, _, cal = lab_run
    sens = list(lab.scenario.probe.sensitivity_db)
    sens[0] += 3.0                                   # the x sensor lost 3 dB since its last calibration
    drifted = InProcessLab(field_error_db=FIELD_ERROR_DB, seed=13, probe_overrides={"sensitivity_db": tuple(sens)})
    with pytest.raises(LabError, match="over range"):      # 3 dB more: the top levels overrange now
        pr.run_plan(pr.linearity_plan(SESSION, levels=(20.0, 30.0)), drifted, repeats=2)
    res = pr.run_plan(pr.full_plan(SESSION, levels=pr.TABLE_LEVELS_V_PER_M[:-3]), drifted, repeats=5)
    new = certify.analyse(SESSION, res)
    cmp = certify.compare(new, cal.certificate, res)
    assert cmp.as_found == "not compliant" and cmp.as_left == "compliant"
    assert cmp.notice.startswith("OUT-OF-TOLERANCE NOTICE") and cal.certificate.certificate_number in cmp.notice
    assert all(abs(r.drift_db[0] - 3.0) < 0.05 for r in cmp.rows)   # drift per frequency: +3 dB on x
    assert all(abs(r.drift_db[1]) < 0.05 for r in cmp.rows)


def test_temperature_coefficient_recovered_and_ols_as_scipy():
    """The chamber steps recover the probe model's coefficient; the slope and its standard error
    are the ordinary least-squares ones (compared with scipy.stats.linregress)."""
    from scipy.stats import linregress

    from meterlink.simulators.scenario import load_scenario
    truth = load_scenario("demo").probe.temp_coeff_db_per_c
    lab = InProcessLab(field_error_db=FIELD_ERROR_DB, seed=5)
    plan = pr.full_plan(SESSION, freqs=(1e8, 1e9, 3e9), levels=(0.2, 1, 3, 10, 30), iso_step_deg=45)
    res = pr.run_plan(plan + pr.temperature_plan(SESSION), lab, repeats=5)
    cal = certify.analyse(SESSION, res)
    tr = cal.temperature
    assert tr is not None and tr.temp_c.tolist() == list(pr.TEMPS_C)
    assert abs(tr.coeff_db_per_c - truth) <= max(3 * tr.u_coeff_db_per_c, 0.0005)
    lr = linregress(tr.temp_c, tr.change_db)
    assert tr.coeff_db_per_c == pytest.approx(lr.slope, rel=1e-9)
    assert tr.u_coeff_db_per_c >= lr.stderr * (1 - 1e-9)   # residual error is one of its parts
    c = cal.certificate
    assert c.temp_coeff_db_per_c == round(tr.coeff_db_per_c, 4) and c.temp_ref_c == SESSION.ambient.temp_c
    assert c.temp_coeff_halfwidth_db_per_c >= math.sqrt(3) * tr.u_coeff_db_per_c
    # the certificate states where the coefficient holds: the chamber's span, and it survives the file
    assert c.temp_range_c == (min(pr.TEMPS_C), max(pr.TEMPS_C))
    from meterlink.physics.certificate import dump_certificate, parse_certificate
    assert parse_certificate(dump_certificate(c)).temp_range_c == c.temp_range_c
    # without chamber steps no range is claimed (none measured), unless kept from the previous certificate
    plain = certify.analyse(SESSION, [r for r in res if r.step.procedure != "temperature"])
    assert plain.certificate.temp_range_c is None
    again = certify.analyse(SESSION, [r for r in res if r.step.procedure != "temperature"], previous=c)
    assert again.certificate.temp_range_c == c.temp_range_c
    # and without a chamber the plan is refused with a clear message, before anything is applied
    class NoChamber:
        def apply(self, *a):
            raise AssertionError("applied")

        def read(self, n):
            raise AssertionError("read")
    with pytest.raises(LabError, match="climatic chamber"):
        pr.run_plan(pr.temperature_plan(SESSION), NoChamber())


def test_end_to_end_over_the_pty(tmp_path):
    """A calibration run over the real pty (pyserial), its certificate loaded by the host and used."""
    plan = pr.full_plan(SESSION, freqs=(1e8, 5e8, 1e9, 3e9), levels=(0.2, 0.5, 1, 3, 10, 30), iso_step_deg=45)
    plan += pr.temperature_plan(SESSION, (10.0, 23.0, 36.0))  # the firmware sees the chamber's temperature
    with LabMeter(field_error_db=FIELD_ERROR_DB, seed=21, speed=100) as lm:
        with MeterLink(lm.port, interval_ms=100) as link:
            bench = MeterBench(lm, link)
            bench.wait_connected()
            res = pr.run_plan(plan, bench, repeats=4)
            cal = certify.analyse(SESSION, res)
            path = tmp_path / "cert.toml"
            path.write_text(dump_certificate(cal.certificate))
            cert = load_certificate(path)
            assert cert == cal.certificate
            # the host measures a new set-up with the loaded certificate
            e_true, f = 4.0, 7e8
            bench.apply(f, e_true / 10 ** (FIELD_ERROR_DB / 20), (0.3, 0.5, 0.8), 30.0, 0.0)
            counts = bench.read(8)
            lm.set_temperature(38.0)  # a hot day: 15 degC above the calibration
            bench.apply(f, e_true / 10 ** (FIELD_ERROR_DB / 20), (0.3, 0.5, 0.8), 30.0, 0.0)
            hot = bench.read(8)
    from meterlink.simulators.scenario import load_scenario
    truth = load_scenario("demo").probe.temp_coeff_db_per_c  # the simulated probe's own coefficient
    assert cert.temp_coeff_db_per_c == pytest.approx(truth, abs=0.002)
    r_hot = calibrate_axes(cert, hot, f, temp_c=38.0, today=SESSION.cal_date)
    r_raw = calibrate_axes(cert, hot, f, today=SESSION.cal_date)  # the same readings, temperature not known
    r = calibrate_axes(cert, counts, f, temp_c=23.0, today=SESSION.cal_date)
    # corrected, the hot readings agree with the ones at 23 degC; uncorrected they read 15 x truth high
    assert abs(20 * np.log10(np.mean(r_hot.e_v_per_m) / np.mean(r.e_v_per_m))) < 0.05
    assert 20 * np.log10(np.mean(r_raw.e_v_per_m) / np.mean(r.e_v_per_m)) == pytest.approx(15 * truth, abs=0.05)
    assert r.flags.max() == 0
    err_db = 20 * np.log10(np.mean(r.e_v_per_m) / e_true)
    # the lab's field error (the bench made 0.2 dB more than it believed) is inherited as a -0.2 dB
    # reading error, plus interpolation across this sparse 4-frequency plan; all inside U of the reading
    assert abs(err_db) <= r.u_expanded_db[0]
    assert abs(err_db + FIELD_ERROR_DB) < 0.3


def test_apply_tick_and_bench_switch_are_one_instant():
    """LabMeter.apply returns the TICK from which readings see the new set-up, exactly (issue 13 item 11).

    The race: the tick was read, then the bench switched at a later device time, so readings timed
    between the two carried the old field yet passed the lab's "after the tick" filter. At speed 1e5
    one real microsecond is 100 device ms, so any gap between the two shows on every call; no host is
    connected (nothing streams), the check is on the bench's own timeline.
    """
    with LabMeter(seed=2, speed=1e5) as lm:
        assert lm.meter.device_tick_ms() >= 0
        prev = 0.0
        for k in range(40):
            e = 10.0 if k % 2 else 1.0
            tick = lm.apply(1e9, e)
            # the meter booted at TICK 0 at simulated time 0 (start_tick_ms = 0, no restart): a reading
            # timed at TICK t sees the bench as it is at t / 1000 s
            assert lm.bench.state_at(tick / 1000)[0].e_v_per_m == e
            assert lm.bench.state_at((tick - 1) / 1000)[0].e_v_per_m == prev   # not switched early either
            prev = e


def test_every_reading_after_the_returned_tick_saw_the_new_set_up(tmp_path):
    """Reading by reading, from the simulator's truth log: the field a reading was made in is the one
    applied last before its TICK (issue 13 item 11).

    Speed 2000 with 100 ms readings: the gap the old apply() left between reading the tick and
    switching the bench (a few real microseconds, i.e. several device ms) held a reading in a few
    percent of calls, and 300 calls make a leak all but certain; with the clock held there is none.
    """
    import time

    from meterlink.simulators.truth import read_truth
    truth = tmp_path / "truth.jsonl"
    applied = []
    with LabMeter(seed=6, speed=2000, truth_path=truth) as lm:
        with MeterLink(lm.port, interval_ms=100) as link:
            MeterBench(lm, link).wait_connected()
            for k in range(300):
                e = 20.0 if k % 2 else 0.5
                applied.append((lm.apply(1e9, e), e))
            last = applied[-1][0]
            deadline = time.monotonic() + 10
            while time.monotonic() < deadline:   # until the device has made readings past the last change
                done = truth.read_text(encoding="utf-8").split("\n")[:-1]   # whole lines only: it is live
                if any('"event":"reading"' in x and json.loads(x)["tick_ms"] > last + 300 for x in done[-5:]):
                    break
                time.sleep(0.01)
    readings = [r for r in read_truth(truth) if r.get("event") == "reading" and r["tick_ms"] >= applied[0][0]]
    assert readings and readings[-1]["tick_ms"] > last + 300
    ticks = [t for t, _ in applied]
    checked = 0
    for r in readings:
        i = bisect.bisect_right(ticks, r["tick_ms"]) - 1
        assert r["e_total_v_per_m"] == pytest.approx(applied[i][1], rel=1e-9), (r["tick_ms"], applied[i])
        checked += 1
    assert checked > 50


@pytest.mark.parametrize("start_tick_ms", [0, 2**32 - 20_000], ids=["fresh", "tick-wraps-mid-plan"])
def test_linearity_steps_take_only_readings_of_their_own_set_up(start_tick_ms):
    """Alternating 20 V/m and 0.2 V/m steps through MeterBench over the pty: no step holds a reading
    of the step before (the host side of item 11: the tick filter with half an interval).

    Frequent thread switches (sys.setswitchinterval) pre-empt the lab thread inside apply(); the
    race itself is shown deterministically by the two tests above. Counts go as E^2, so one leaked
    reading is a factor of about 10^4. Started 20 s of device time before the 32-bit TICK wraps
    (docs/protocol.md: TICK is u32 ms), the link's unwrapped ticks and the controller's raw tick
    part ways mid-plan: compared plainly, every old reading looked newer than the set-up.
    """
    import sys

    from meterlink.lab.session import Step, axis_direction_world
    plan = [Step("linearity", 1e9, 0.2 if k % 2 else 20.0, axis_direction_world("x"), axis="x", role="table")
            for k in range(160)]
    old = sys.getswitchinterval()
    sys.setswitchinterval(1e-5)
    try:
        with LabMeter(seed=4, speed=300, start_tick_ms=start_tick_ms) as lm:
            with MeterLink(lm.port, interval_ms=100) as link:
                bench = MeterBench(lm, link)
                bench.wait_connected()
                res = pr.run_plan(plan, bench, repeats=3)
    finally:
        sys.setswitchinterval(old)
    low = [r.counts[:, 0] for r in res if r.step.e_ref_v_per_m < 1]
    high = [r.counts[:, 0] for r in res if r.step.e_ref_v_per_m > 1]
    ceiling, floor = max(c.max() for c in low), min(c.min() for c in high)
    assert floor > 100 * ceiling, (floor, ceiling)

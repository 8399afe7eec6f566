"""Per-band series of a dipole-receiver meter over the pty simulator, against the simulator's truth log.

The simulated receiver sweeps x, y, z (one orientation per interval); the monitor calibrates each
orientation with the demo dipole certificate, sums them in power and keeps 6-minute blocks per
configured band, for all lines together and for the total exposure ratio. Expected values come
from the truth log (the field each transmitter really set up) reduced with meterlink.physics.averaging, and
reference levels from ICNIRP 2020, Health Phys 118(5), Table 5 (whole body, general public):
S_L = 2 W/m^2 for >30-400 MHz, f_MHz/200 W/m^2 for >400 MHz-2 GHz, 10 W/m^2 for >2-300 GHz,
summed as S/S_L (ICNIRP 2020, Appendix A, summation for whole-body exposure).
"""

from __future__ import annotations

import math
import sqlite3
import threading
import time

import numpy as np
from scipy.constants import physical_constants

from meterlink.physics import averaging
from meterlink.station.monitor import Monitor
from meterlink.station.stationfile import parse_station
from meterlink.simulators.pty_meter import SimulatedMeter
from meterlink.simulators.truth import read_truth

Z0 = physical_constants["characteristic impedance of vacuum"][0]
INTERVAL_S = 2.0
SPEED = 400.0
BLOCKS = 7
BANDS = {"fm": (87.5e6, 108e6), "dab": (174e6, 240e6), "broadcast-tv": (470e6, 694e6), "mobile": (694e6, 3.8e9)}

STATION = f"""
format = "meterlink-station/1"
[station]
name = "Brannock Tor receiver station"
database = "bands.db"
[assessment]
standard = "icnirp-2020"
tier = "public"
band = ["30 MHz", "6 GHz"]
interval_s = {INTERVAL_S}
windows_s = [360, 1800]
[[meter]]
name = "spectrum"
port = "PORT"
certificate = "demo-dipole"
""" + "".join(f'[[meter.bands]]\nname = "{n}"\nlow = {lo}\nhigh = {hi}\n' for n, (lo, hi) in BANDS.items())


def _s_ref_icnirp2020_public(f_hz: float) -> float:
    """ICNIRP 2020 Table 5, general public, whole body, S_inc (W/m^2)."""
    if f_hz <= 400e6:
        return 2.0
    if f_hz <= 2e9:
        return f_hz / 1e6 / 200.0
    return 10.0


def _run(tmp_path):
    truth = tmp_path / "truth.jsonl"
    with SimulatedMeter("station", sensor="dipole", meter=0, seed=5, speed=SPEED, truth_path=truth) as sim:
        st = parse_station(STATION.replace("PORT", sim.port), tmp_path / "station.toml")
        mon = Monitor(st, time_scale=SPEED, backoff_max_s=0.5)
        th = threading.Thread(target=mon.run)
        th.start()
        conn = sqlite3.connect(st.database, timeout=10)
        deadline = time.monotonic() + BLOCKS * 360 / SPEED + 40
        try:
            while time.monotonic() < deadline:
                n = conn.execute("SELECT count(*) FROM mon_block WHERE band='mobile'").fetchone()[0]
                if n >= BLOCKS:
                    break
                th.join(0.2)
                assert th.is_alive(), "monitor ended by itself"
        finally:
            mon.stop()
            th.join(30)
            conn.close()
        assert not th.is_alive()
    return st, read_truth(truth)


def test_band_blocks_and_exposure_ratio_against_truth(tmp_path):
    st, truth = _run(tmp_path)
    conn = sqlite3.connect(st.database)
    assert conn.execute("SELECT count(*) FROM events WHERE kind='internal_error'").fetchone()[0] == 0
    sid = conn.execute("SELECT session_id FROM mon_meter").fetchone()[0]
    # the sweep's value is stamped with its last (z) spectrum: join those with the truth by (boot, seq)
    ends = conn.execute("SELECT boot, seq, t_utc FROM spectra WHERE session_id=? AND orientation=2 ORDER BY t_utc",
                        (sid,)).fetchall()
    rec = {(r["boot"], r["seq"]): r for r in truth if r.get("event") == "reading"}
    t = np.array([e[2] for e in ends])
    srcs = [rec[(b, s)]["sources"] for b, s, _ in ends]
    hold = 9 * INTERVAL_S
    u_db = {}
    checked = 0
    for band, (lo, hi) in [*BANDS.items(), ("total", (0.0, math.inf))]:
        e_true = np.array([math.sqrt(sum(x["e_v_per_m"] ** 2 for x in s if lo <= x["freq_hz"] <= hi)) for s in srcs])
        assert e_true.max() > 0.01, band      # each band has a transmitter in it
        ref = averaging.block_averages(t, e_true, 360.0, max_hold_s=hold)
        want = {round(a): v for a, v, ok in zip(ref.t_start_s, ref.value, ref.complete) if ok}
        rows = conn.execute("SELECT t_start_utc, e_rms_v_per_m, complete, n_overrange FROM mon_block WHERE band=? "
                            "ORDER BY t_start_utc", (band,)).fetchall()
        assert len(rows) >= BLOCKS - 1
        u = conn.execute("SELECT u_expanded_db FROM mon_meter").fetchone()[0]
        assert 0.5 < u < 6.0
        u_db[band] = u
        for t0, v, ok, n_over in rows:
            if ok and round(t0) in want:
                checked += 1
                err_db = 20 * math.log10(v / want[round(t0)])
                if n_over:
                    # a line above the receiver's calibrated level range (the FM carriers on the z dipole here:
                    # up to 125 dBuV against a range ending at 120) is calibrated at the top of the range, so
                    # the band value is a lower bound: it may fall short of the truth, never exceed it beyond U
                    assert err_db <= u, (band, t0, v, want[round(t0)])
                    continue
                # within the stated expanded uncertainty of the dipole certificate's budget (k = 2)
                assert abs(err_db) <= u, (band, t0, v, want[round(t0)])
    assert checked >= 4 * (BLOCKS - 2)
    # the scene drives the z dipole past the receiver's range on the FM carriers: those blocks say so
    assert conn.execute("SELECT count(*) FROM mon_block WHERE band='fm' AND n_overrange > 0").fetchone()[0] >= 1
    # the bands are disjoint and hold every transmitter of the scene: their power adds up to the total
    tot = dict(conn.execute("SELECT t_start_utc, energy FROM mon_block WHERE band='total'").fetchall())
    parts: dict = {}
    for t0, en in conn.execute("SELECT t_start_utc, energy FROM mon_block WHERE band IN ('fm','dab','broadcast-tv','mobile')"):
        parts[t0] = parts.get(t0, 0.0) + en
    for t0, en in parts.items():
        assert en <= tot[t0] * (1 + 1e-9) and en >= (1 - 1e-9) * tot[t0]
    # total exposure ratio: time mean of sum S_i / S_L(f_i), S_i = E_i^2 / Z0 (far field)
    r_true = np.array([sum(x["e_v_per_m"] ** 2 / Z0 / _s_ref_icnirp2020_public(x["freq_hz"]) for x in s)
                       for s in srcs])
    ref = averaging.block_averages_s(t, r_true, 360.0, max_hold_s=hold)
    want = {round(a): v for a, v, ok in zip(ref.t_start_s, ref.value, ref.complete) if ok}
    rows = conn.execute("SELECT t_start_utc, energy / covered_s, complete, n_overrange FROM mon_block "
                        "WHERE band='exposure_ratio'").fetchall()
    n = 0
    for t0, ratio, ok, n_over in rows:
        if ok and round(t0) in want:
            n += 1
            err_db = 10 * math.log10(ratio / want[round(t0)])
            # with an over-range line in the sweep the ratio is a lower bound, as the band values above
            assert (err_db if n_over else abs(err_db)) <= u_db["total"], (t0, ratio, want[round(t0)])
    assert n >= BLOCKS - 2
    # running averages are kept per band too
    assert conn.execute("SELECT count(*) FROM mon_running WHERE band='fm' AND window_s=360").fetchone()[0] >= BLOCKS - 1

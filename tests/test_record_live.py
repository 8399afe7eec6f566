"""`record` shows the live field and its percent of the reference level while recording (a real
recording from the simulated meter on its pty), in the colour of the shared percent scale."""

from __future__ import annotations

import io
import math
import re

from rich.console import Console

from meterlink.commands.record import _Live, _progress
from meterlink.physics.calibrate import calibrate_axes
from meterlink.reports.percent_scale import style_power
from meterlink.simulators.pty_meter import SimulatedMeter
from meterlink.storage.processing import calibrated_series
from meterlink.storage.recorder import Recorder
from meterlink.storage.store import Store


def test_live_field_and_percent_while_recording(tmp_path):
    shown = []
    live = _Live(None, 101.8e6, None, "icnirp-2020", "public")
    con = Console(file=io.StringIO(), force_terminal=True, width=200)
    prog = _progress(True, 20.0, live, console=con)
    with SimulatedMeter("demo", sensor="probe", seed=14, speed=100.0) as sim, Store(tmp_path / "r.db") as store:
        with prog as on_item:
            def spy(item):
                on_item(item)
                shown.append(prog.bar.tasks[0].fields["field"])
            rec = Recorder(store, sim.port, interval_ms=1000, duration_s=20.0, host_timeout_s=30.0, freq_hz=101.8e6,
                           on_item=spy)
            summary = rec.run()
        series = calibrated_series(store, summary.session_id, freq_hz=101.8e6)
        raw_last = store.readings(summary.session_id).raw[-1]
        temps_c = [t for t in store.status_temperatures(summary.session_id) if t is not None]
    last = [s for s in shown if s.startswith("[")][-1]
    m = re.match(r"\[(#?\w+)\]E (\S+) V/m  (\S+) % of the power-density level \(icnirp-2020 public\)\[/\]", last)
    assert m, last
    e_live, pct_live = float(m.group(2)), float(m.group(3))
    # the last reading as stored and calibrated after the recording (at the session's median temperature);
    # the live line calibrates it at the meter's last reported temperature, so it may differ by the
    # temperature correction between the two: the same reading at each reported temperature bounds it
    e_last = float(series.e_v_per_m[-1])
    half_ulp = 0.5 * 10 ** (math.floor(math.log10(e_last)) - 2)               # shown with 3 significant digits
    at_temps = [e_last] + [float(calibrate_axes(live.cert, [raw_last], 101.8e6, t).e_v_per_m[0]) for t in temps_c]
    assert min(at_temps) - half_ulp - 1e-12 <= e_live <= max(at_temps) + half_ulp + 1e-12
    assert max(at_temps) - min(at_temps) < 0.01 * e_last       # the temperature correction is small
    # ICNIRP 2020 Table 5, public, 30-400 MHz: E_L = 27.7 V/m; percent of the power-density level = (E/E_L)^2
    assert abs(pct_live - 100 * (e_last / 27.7) ** 2) <= 0.05 + 1e-6
    assert m.group(1) == style_power(pct_live / 100)
    # on an 80-column terminal nothing is cut: the bar and device time on one line, the field on the next
    narrow = Console(file=io.StringIO(), width=80, color_system=None)
    narrow.print(*prog.bar.get_renderables())
    lines = [x.rstrip() for x in narrow.file.getvalue().splitlines() if x.strip()]
    assert lines[0].startswith("recording") and re.search(r"\d+ s device time, \d+ readings \d:\d\d:\d\d$", lines[0])
    assert lines[1] == f"E {m.group(2)} V/m  {m.group(3)} % of the power-density level (icnirp-2020 public)"
    assert "…" not in "".join(lines)

"""Run a survey: open the link, fix the plan's choices in the database, then measure each point
(place the probe, let it settle, capture, assess, store) with an optional live readout."""

from __future__ import annotations

import dataclasses
import datetime
import math
import threading
import time
from typing import Callable

from meterlink.physics.certificate import DipoleCertificate, certificate_status, load_certificate
from meterlink.errors import LinkError, MeterlinkError
from meterlink.device.link import Connected, MeterLink
from meterlink.device.protocol import SensorKind
from meterlink.storage.store import BatchWriter, Store, epoch_row
from meterlink.survey import store as sstore
from meterlink.survey.assess import assess, broadband_reference, point_temperatures
from meterlink.survey.capture import Capture, View
from meterlink.survey.model import Point, PointResult, SurveyPlan
from meterlink.survey.plan import load_plan
from meterlink.survey.positions import GnssNotes

CONNECT_TIMEOUT_S = 15.0


def walk_path(waypoints, fallback):
    """frac (0..1 of the sweep) and height -> (x, y, z) along a polyline at constant speed."""
    pts = [tuple(map(float, w)) for w in waypoints] or ([fallback[:2]] if fallback else [])
    if not pts:
        return None
    seg = [math.dist(a, b) for a, b in zip(pts, pts[1:])]
    total = sum(seg)

    def at(frac: float, height_m: float):
        if total <= 0:
            return (pts[0][0], pts[0][1], float(height_m))
        d, i = max(0.0, min(1.0, frac)) * total, 0
        while i < len(seg) - 1 and d > seg[i]:
            d -= seg[i]
            i += 1
        f = d / seg[i] if seg[i] else 0.0
        (x0, y0), (x1, y1) = pts[i], pts[i + 1]
        return (x0 + f * (x1 - x0), y0 + f * (y1 - y0), float(height_m))
    return at


class Survey(GnssNotes):
    """One survey session over one meter; use as a context manager, then measure() points."""

    def __init__(self, store: Store, port: str, plan: SurveyPlan, *, mover: Callable | None = None,
                 on_view: Callable[[View], None] | None = None, ready: Callable[[Point, float], None] | None = None,
                 link_factory=None, gnss_port: str | None = None, gnss_factory=None, gnss_max_age_s: float = 2.0,
                 gnss_max_gap_s: float = 2.0, gnss_output_delay_s: float | None = None,
                 declared=None, analyser: str | None = None, journal_dir=None, orient: Callable | None = None,
                 analyser_timeout_s: float = 5.0, resume: int | None = None, **link_options):
        self.store, self.port, self.plan = store, port, plan
        self.analyser = analyser        # VISA address of the spectrum analyser for selective points (overrides the plan)
        self.journal_dir = journal_dir  # where selective points' journals go (default: beside the database)
        self.orient = orient            # orient(axis): turn a single-axis antenna (selective points, antenna "three")
        self.analyser_timeout_s = analyser_timeout_s
        self.resume = resume            # session id of a stored survey to add re-measurements to, or None
        self.gnss_port = gnss_port
        self.declared = declared      # planning Site of the plan's sources file (read by the caller), or None
        self.gnss = None
        self.gnss_delay_from = None     # where the receiver's declared output delay came from: "option", "plan" or None
        self.gnss_max_age_s = gnss_max_age_s    # host seconds a fix counts as current, for the first fix
        self.gnss_max_gap_s = gnss_max_gap_s    # GNSS seconds between fixes a reading's position may bridge
        self._offset_said = False
        self.n_positioned = self.n_unpositioned = 0     # survey_trace rows stored with and without a position
        if gnss_port is not None or gnss_factory is not None:
            from meterlink.device.gnss import GnssLink
            self.gnss = GnssLink(gnss_port or "gnss", link_factory=gnss_factory)
            # the receiver's output delay: the option's, else the plan's, else none declared
            delay = gnss_output_delay_s if gnss_output_delay_s is not None else plan.gnss_output_delay_s
            self.gnss.output_delay_s = delay or 0.0
            self.gnss_delay_from = ("option" if gnss_output_delay_s is not None else
                                    "plan" if plan.gnss_output_delay_s is not None else None)
        self.cert = load_certificate(plan.certificate)
        self.dipole = isinstance(self.cert, DipoleCertificate)
        band = plan.freq_hz if plan.freq_hz is not None else (plan.band_hz or self.cert.freq_range_hz)
        self.ref = broadband_reference(plan.standard, plan.tier, band)
        self.mover, self.ready = mover, ready
        self.on_view = on_view
        self.link = MeterLink(port, plan.interval_ms, link_factory=link_factory, **link_options)
        if self.gnss is not None:       # fix arrivals in the readings' time scale: the meter's clock mapping
            self.gnss.frame_clock = self.link.clock.utc_at_host
            self.gnss.frame_key = lambda: self.link.clock.mapping
        self.session_id: int | None = None
        self.results: list[PointResult] = []
        self._numbers: dict[str, int] = {}      # point label -> point_no, for re-measurements
        self.interrupt_event = threading.Event()
        self._writer = None
        self.capture: Capture | None = None

    def interrupt(self) -> None:
        """Stop the point being measured; it is kept, marked incomplete."""
        self.interrupt_event.set()

    # -- lifecycle -----------------------------------------------------------------------------
    def __enter__(self) -> "Survey":
        plan = self.plan
        if self.gnss is not None:
            self.gnss.start(require_open=True)      # a --gps port that cannot be opened: one-line error now
        try:
            self.link.start(require_open=True)
        except BaseException:
            if self.gnss is not None:
                self.gnss.stop()
            raise
        try:
            if self.resume is not None:
                self.session_id = self.resume
                self._numbers = {str(lb): int(no) for lb, no in self.store.db.execute(
                    "SELECT label, point_no FROM survey_points WHERE session_id = ? AND replaced_by IS NULL",
                    [self.resume]).fetchall()}
            else:
                self.session_id = self.store.begin_session(
                    "survey", self.port, interval_ms=plan.interval_ms, freq_hz=plan.freq_hz,
                    band_lo_hz=plan.band_hz[0] if plan.band_hz else None,
                    band_hi_hz=plan.band_hz[1] if plan.band_hz else None, notes=plan.title or plan.site.name)
            self._writer = BatchWriter(self.store, self.session_id)
            names = {s.freq_hz: s.name for s in plan.sources}
            self.capture = Capture(
                self.link, self._writer, self.cert, standard=plan.standard, tier=plan.tier,
                e_ref_v_per_m=self.ref.e_v_per_m, freq_hz=plan.freq_hz, band_hz=plan.band_hz,
                settle_s=plan.settle_s, on_view=self.on_view, stop_event=self.interrupt_event,
                names=lambda f: next((n for sf, n in names.items() if abs(sf - f) <= 0.005 * sf),
                                     f"{f / 1e6:.1f} MHz"),
                followup_v_per_m=plan.followup.threshold_v_per_m(self.ref.e_v_per_m), gnss=self.gnss,
                gnss_max_gap_s=self.gnss_max_gap_s)
            if self.resume is not None:     # from the first reading on: never among the earlier ones
                row = epoch_row(self.session_id, None, "re-measurement")
                self._writer.add_epoch(row)
                self.capture.epoch = row["id"]
            self._connect()
            self._first_fix()
            if self.resume is None:
                sstore.create_survey(self.store, self.session_id, plan, self.cert, self.ref,
                                     "dipole" if self.dipole else "probe", gnss_port=self.gnss_port,
                                     declared=self.declared)
        except BaseException:
            self.__exit__(None, None, None)
            raise
        return self

    def _connect(self) -> None:
        deadline = time.monotonic() + CONNECT_TIMEOUT_S
        while self.capture.connected is None:
            if time.monotonic() > deadline or (self.link.finished.is_set() and self.link.queue.empty()):
                raise LinkError(f"no handshake with the meter on {self.port} within {CONNECT_TIMEOUT_S:g} s")
            item = self.link.get(0.1)
            if item is not None:
                self.capture._item(item)
        c: Connected = self.capture.connected
        i = c.ident
        dev = self.store.device_id(i.model, i.serial, i.probe_serial, i.cert_ref, i.sensor_kind,
                                   f"{i.fw_major}.{i.fw_minor}.{i.fw_patch}", f"{i.proto_major}.{i.proto_minor}")
        if self.resume is not None:
            self._resumed(c, dev)
        else:
            self.store.update_session(self.session_id, device_id=dev, interval_ms=c.interval_ms, clock_boot=c.boot,
                                      clock_tick0_ms=c.mapping.tick0_ms, clock_utc0_s=c.mapping.utc0_s)
        if (i.sensor_kind == SensorKind.DIPOLE_RX) != self.dipole:
            raise MeterlinkError(f"certificate {self.plan.certificate!r} is for a "
                                 f"{'dipole receiver' if self.dipole else 'probe'} but the meter on {self.port} "
                                 f"reports sensor kind {i.sensor_kind}")

    def _resumed(self, c: Connected, dev: int) -> None:
        """A stored survey measured again: the same meter and probe as before (its certificate was fixed
        with the survey), its readings in a new epoch of the session so they never meet the earlier ones."""
        ses = self.store.session(self.session_id)
        i = c.ident
        if ses["device_id"] is not None and (ses["device_serial"], ses["device_probe_serial"]) != (i.serial,
                                                                                                i.probe_serial):
            self._writer.add_event("remeasure_refused", "warning", f"another instrument on {self.port} (serial "
                                   f"{i.serial}, probe {i.probe_serial}): nothing measured; its readings stay in "
                                   f"epoch {self.capture.epoch}", epoch=self.capture.epoch, device_id=dev)
            raise MeterlinkError(f"the meter on {self.port} (serial {i.serial}, probe {i.probe_serial}) is not the one "
                                 f"of survey {self.session_id} (serial {ses['device_serial']}, probe "
                                 f"{ses['device_probe_serial']}): re-measure with the same instrument")
        self._writer.add_event("survey_resumed", "info", f"survey {self.session_id} resumed on {self.port} to "
                               f"re-measure (meter serial {i.serial}, probe {i.probe_serial}, boot {c.boot})",
                               epoch=self.capture.epoch, device_id=dev)

    def __exit__(self, *exc) -> None:
        self.link.stop()
        if self.gnss is not None:
            self.gnss.stop()
        if self._writer is not None:
            if self.capture is not None:
                self.capture.drain()
                self._gnss_summary()
            self._writer.close()
        if self.session_id is not None and (self.resume is None or self.results):
            self.store.end_session(self.session_id)
            if "survey" in self.store.db.table_names() and self.store.db["survey"].count_where(
                    "session_id = ?", [self.session_id]):
                sstore.end_survey(self.store, self.session_id)

    # -- points --------------------------------------------------------------------------------
    def _duration(self, p: Point) -> float:
        if p.duration_s is not None:
            return p.duration_s
        return {"spot": self.plan.spot_s, "spatial": self.plan.spot_s, "sweep": self.plan.sweep_s,
                "average": self.ref.averaging_time_s or self.plan.spot_s}[p.mode]

    def measure(self, p: Point, reason: str | None = None) -> PointResult:
        """Place, settle and capture every height of the point, then assess and store it. With a
        reason, a point measured before is measured again: the new capture replaces the old one in
        the conclusion, and both stay in the record."""
        cap = self.capture
        self.interrupt_event.clear()
        if p.mode == "selective":
            if reason is not None:
                raise MeterlinkError(f"point {p.label!r}: a selective point is not re-measured in place; every "
                                     "selective point is kept, so measure it again as a new point")
            return self._measure_selective(p)
        if reason is not None:
            if p.label not in self._numbers:
                raise MeterlinkError(f"point {p.label!r} has not been measured in this survey: nothing to re-measure")
            if not reason.strip():
                raise MeterlinkError(f"point {p.label!r}: a re-measurement needs its reason")
            no = self._numbers[p.label]
        else:
            no = max(self._numbers.values(), default=0) + 1
        heights = p.scheme.heights_m if p.mode == "spatial" and p.scheme else (p.height_m,)
        dur = self._duration(p)
        samples, interrupted = [], False
        cap.trace = []
        for k, h in enumerate(heights):
            base = {"label": p.label, "mode": p.mode, "height_m": h,
                    "sample": f"height {k + 1} of {len(heights)}" if len(heights) > 1 else ""}
            cap.position = p.position_m(h)
            placed_at = None
            if cap.position is not None and self.mover is not None:
                placed_at = self.mover(cap.position)     # the simulator says which frame is the first after
            elif self.ready is not None:
                self.ready(p, h)
            cap.settle(base, no, k, host_timeout_s=2 * self.plan.settle_s + 30,
                       placed_at=placed_at if isinstance(placed_at, tuple) and len(placed_at) == 2 else None)
            walk = walk_path(p.walk_m, cap.position) if p.mode == "sweep" else None
            s, interrupted = cap.collect(dur, base, no, k, height_m=h, walk=walk,
                                         mover=self.mover if walk else None)
            if p.mode == "sweep":
                s = self._max_hold(s, no, k)
            samples.append(s)
            if interrupted:
                break
        if not any(s.n_readings for s in samples):
            raise MeterlinkError(f"point {p.label!r}: no readings arrived from {self.port}")
        samples = [s for s in samples if s.n_readings]
        warn = list(certificate_status(self.cert, datetime.date.today()))
        if self.gnss is not None:
            n_geo = sum(s.geo.n_positioned for s in samples if s.geo is not None)
            n_all = sum(s.n_readings for s in samples)
            if n_geo < n_all:
                warn.append(f"GNSS: {n_all - n_geo} of {n_all} reading(s) without a position (receiver lost, "
                            "no fix or bad sentences; see the events)")
        if p.mode == "sweep":
            warn.append("sweep: maximum hold of single readings, not an average")
        res = assess(self.plan, p, tuple(samples), self.ref, interrupted=interrupted,
                     shortened=(p.mode == "average" and self.ref.averaging_time_s is not None
                                and dur < self.ref.averaging_time_s - 1e-9), warnings=tuple(warn),
                     temperatures=point_temperatures(tuple(samples), self.cert.temp_range_c))
        self._writer.flush()
        if self.gnss is not None:
            cap.place(final=True)        # rows from before the settle (drained late) get theirs too
            self._say_offset()
            n_pos = sum(1 for t in cap.trace if t.get("lat_deg") is not None)
            self.n_positioned += n_pos
            self.n_unpositioned += len(cap.trace) - n_pos
        sstore.add_point(self.store, self.session_id, no, res, cap.trace, reason)
        self._numbers.setdefault(p.label, no)
        if p.photos:        # checked when given; one gone since is kept as an event, the point stays stored
            from meterlink.survey.photos import store_photos
            try:
                store_photos(self.store, self.session_id, no, p.label, p.photos)
            except MeterlinkError as exc:
                self._writer.add_event("photo_not_kept", "warning", f"{exc}: not copied into the survey")
        cap.trace = []
        self.results.append(res)
        return res

    def _measure_selective(self, p: Point) -> PointResult:
        """A frequency-selective point over the analyser: bands swept, journal written band by band, then the
        point stored (survey_points and survey_emitters as for any point, the full record in sel_*)."""
        from meterlink.survey.selective_point import measure_selective_point

        spec = p.selective
        address = self.analyser or spec.analyser
        if not address:
            raise MeterlinkError(f"point {p.label!r}: no analyser address (give analyser = \"...\" in the plan "
                                 "or --analyser)")
        no = max(self._numbers.values(), default=0) + 1
        if p.position_m() is not None and self.mover is not None:
            self.mover(p.position_m())
        elif self.ready is not None:
            self.ready(p, p.height_m)
        from pathlib import Path
        jdir = Path(self.journal_dir) if self.journal_dir else Path(self.store.path).parent
        journal = jdir / f"{Path(self.store.path).stem}-survey{self.session_id}-point{no}-selective.jsonl"
        res = measure_selective_point(self.store, self.session_id, no, self.plan, p, address, journal, self.ref,
                                      orient=self.orient, timeout_s=self.analyser_timeout_s)
        self._numbers[f"{p.label}\x00selective"] = no
        self.results.append(res)
        return res

    def _max_hold(self, s, no, k):
        used = [t for t in self.capture.trace if t["point_no"] == no and t["sample_no"] == k and t["used"]
                and t["e_v_per_m"] is not None and math.isfinite(t["e_v_per_m"])]
        if not used:
            return s
        best = max(used, key=lambda t: t["e_v_per_m"])
        pos = (best["x_m"], best["y_m"], best["z_m"]) if best["x_m"] is not None else s.position_m
        geo = s.geo
        if best.get("lat_deg") is not None:     # the maximum's own fix
            from meterlink.survey.capture import Geo
            geo = Geo(best["lat_deg"], best["lon_deg"], best["alt_m"], best["pos_u_m"], best["fix_utc"],
                      s.geo.n_positioned if s.geo else 1)
        elif self.gnss is not None:
            geo = None
        return dataclasses.replace(s, e_v_per_m=s.e_max_v_per_m, position_m=pos, geo=geo)


def run_plan(port: str, plan_path_or_dict, db_path, *, console=None, mover: Callable | None = None,
             on_view: Callable[[View], None] | None = None, ready: Callable[[Point, float], None] | None = None,
             gnss_port: str | None = None, declared=None, analyser: str | None = None, orient: Callable | None = None,
             **link_options) -> int:
    """Measure every point of a plan against the meter on port; returns the survey session id.

    mover(position_m) is called to place the probe (the simulated meter's move_to); without it,
    ready(point, height_m) (e.g. a prompt) waits for the technician; console (a rich Console)
    shows the live readout and one line per point."""
    plan = load_plan(plan_path_or_dict)
    if plan.sources_file and declared is None:
        raise MeterlinkError(f"the plan names the sources file {plan.sources_file!r}: read it with "
                             "meterlink.planning.sourcefile.load_site and pass it as declared=")
    from meterlink.survey.readout import LiveReadout

    with Store(db_path) as store, LiveReadout(console, on_view) as live:
        def ready_seen(point, height_m):
            with live.paused():
                ready(point, height_m)

        with Survey(store, port, plan, mover=mover, on_view=live.update, ready=ready_seen if ready else None,
                    gnss_port=gnss_port, declared=declared, analyser=analyser, orient=orient,
                    **link_options) as sv:
            for p in plan.points:
                try:
                    res = sv.measure(p)
                except KeyboardInterrupt:
                    break
                except EOFError:    # Ctrl-D at the "hold the probe" prompt: end here, keep what was measured
                    if console is not None:
                        console.print(f"input ended: survey closed after {len(sv.results)} point(s)")
                    break
                live.point_done(res)
                if not res.complete and sv.interrupt_event.is_set():
                    break
            return int(sv.session_id)

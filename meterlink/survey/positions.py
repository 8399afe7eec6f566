"""Positions for a survey: the GNSS side of Capture (each stored reading given the position at its
own time) and of Survey (the first fix, and the events that say how positioning went).

Both classes are mixins: they read the attributes their host sets (Capture: gnss, writer, trace,
_unplaced, offset, gnss_max_gap_s; Survey: gnss, link, capture, _writer, the counts and settings).
"""

from __future__ import annotations

import math
import time


class Placing:
    """Capture's GNSS half: readings placed on the receiver's track by time, receiver events stored."""

    def gnss_events(self) -> None:
        """Store what the GNSS receiver reported (lost, back, no fix, bad sentences) as events."""
        if self.gnss is not None:
            for e in self.gnss.events():
                self.writer.add_event(e.kind, e.severity, e.message, e.t_utc, **e.detail)

    def place(self, final: bool = True) -> None:
        """Give the trace rows waiting for one their GNSS position, by time: each reading's UTC less
        the estimated offset (readings' time - GNSS time) is its GNSS time, and the position there is
        interpolated between the fixes that bracket it (device.gnss.position_on_track). A row whose
        later fix has not arrived yet waits, unless final: then the receiver is given a little while
        (a few fix intervals of host time) to send it, and the row is placed with what there is."""
        rows = self._unplaced
        if self.gnss is None or not rows:
            return
        from meterlink.device.gnss import position_on_track

        if final:
            self._await_fix_after(max(r["t_utc"] for r in rows))
        off = self.gnss.time_offset()
        if off is None:                  # no fix with a time yet
            if final:
                self._unplaced = []
            return
        self.offset = off
        tq = [r["t_utc"] - off.offset_s for r in rows]
        track = self.gnss.track(min(tq) - self.gnss_max_gap_s, max(tq) + self.gnss_max_gap_s)
        newest = track[-1].fix_utc if track else -math.inf
        keep = []
        for r, t in zip(rows, tq):
            if not final and t > newest:
                keep.append(r)
                continue
            p = position_on_track(track, t, max_gap_s=self.gnss_max_gap_s, timing_u_s=off.spread_s)
            if p is not None:
                r.update(lat_deg=p.lat_deg, lon_deg=p.lon_deg, alt_m=p.alt_m, pos_u_m=p.accuracy_m,
                         fix_utc=p.fix_utc, fix_quality=p.quality, n_sats=p.n_sats, hdop=p.hdop)
        self._unplaced = keep

    def _await_fix_after(self, t_utc: float) -> None:
        """Wait (host time, bounded) for a fix at or after the GNSS time of t_utc; the meter's
        readings wait in the link's queue meanwhile. No wait when the receiver has no fix."""
        interval = self.gnss.fix_interval_host_s()
        if interval is None:
            return
        wait_s = min(3.0, max(0.1, 4 * interval))
        deadline = time.monotonic() + wait_s
        while time.monotonic() < deadline:
            off, newest = self.gnss.time_offset(), self.gnss.newest_fix_utc()
            if off is None or newest is None or self.gnss.latest(None) is None:
                return
            if newest >= t_utc - off.offset_s:
                return
            if time.monotonic() - self.gnss.last_arrival_host() > wait_s:
                return                   # fixes stopped coming (garbage on the line): do not wait for one
            time.sleep(min(0.01, max(0.002, interval / 4)))



class GnssNotes:
    """Survey's GNSS half: wait for a first fix, and record how positioning went, with exact counts."""

    def _first_fix(self, wait_s: float = 5.0) -> None:
        """Give the receiver up to wait_s (host seconds) for a first fix; without one the survey
        goes on and the event says so."""
        if self.gnss is None:
            return
        deadline = time.monotonic() + wait_s
        while self.gnss.latest(self.gnss_max_age_s) is None and time.monotonic() < deadline:
            item = self.link.get(0.01)          # keep storing what the meter sends meanwhile
            if item is not None:
                self.capture._item(item)
        if self.gnss.latest(self.gnss_max_age_s) is None:
            self._writer.add_event("gnss_no_fix_at_start", "warning", f"no GNSS fix from {self.gnss.port} within "
                                   f"{wait_s:g} s: the survey starts without positions")

    def _gnss_summary(self) -> None:
        """One closing event with exact counts: values with and without a position, sentences used
        and rejected, losses of the receiver."""
        if self.gnss is None or self.capture is None:
            return
        self.capture.gnss_events()
        st = self.gnss.summary()
        n_all = self.n_positioned + self.n_unpositioned
        sev = "info" if self.n_unpositioned == 0 else "warning"
        off = self.capture.offset
        said = "" if off is None else (f"; readings' time - GNSS time {off.offset_s:+.3f} s (median of {off.n} "
                                       f"fixes, spread {off.spread_s:.3f} s)")
        delay, source = self.gnss.output_delay_s, self.gnss_delay_from
        where = "--gps-output-delay" if source == "option" else "plan"
        said += (f"; receiver output delay {delay:.3f} s declared ({where}), taken out of the offset" if source
                 else "; no receiver output delay declared (the offset includes it)")
        self._writer.add_event(
            "gnss_summary", sev, f"GNSS on {self.gnss.port}: {self.n_positioned} of {n_all} stored value(s) "
            f"positioned, {self.n_unpositioned} without position; {st['bad_checksum']} sentence(s) with a bad "
            f"checksum and {st['malformed']} malformed not used; receiver lost {st['port_losses']} time(s)" + said,
            positioned=self.n_positioned, unpositioned=self.n_unpositioned,
            offset_s=None if off is None else off.offset_s, offset_spread_s=None if off is None else off.spread_s,
            offset_n=None if off is None else off.n, output_delay_s=delay if source else None,
            output_delay_from=source, **st)

    def _say_offset(self) -> None:
        """Once per survey, when the readings' time and GNSS time differ by more than OFFSET_LARGE_S:
        the event says so (a host clock off UTC, or a meter clock mapped long ago); positions are
        matched after correcting for it either way."""
        from meterlink.device.gnss import OFFSET_LARGE_S

        off = self.capture.offset if self.capture is not None else None
        if off is None or self._offset_said or abs(off.offset_s) <= OFFSET_LARGE_S:
            return
        self._offset_said = True
        self._writer.add_event(
            "gnss_time_offset", "warning", f"the readings' time and GNSS time differ by {off.offset_s:+.3f} s "
            f"(median of {off.n} fixes, spread {off.spread_s:.3f} s): positions are matched to readings after "
            "correcting for it; check the host's clock against UTC (a simulated meter running faster than real "
            "time shows such an offset too)", offset_s=off.offset_s,
            spread_s=off.spread_s, n=off.n)

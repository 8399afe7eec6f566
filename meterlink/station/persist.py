"""The monitor's records in its database: the station and meter rows, the replay after a restart,
and the one transaction per commit that stores every meter's buffered rows with the derived rows
and the alarm state (so a crash leaves them mutually consistent), retried with back-off on failure.

``Persistence`` is a part of :class:`meterlink.station.monitor.Monitor`.
"""

from __future__ import annotations

import json
import math
import os
import sqlite3
import time

from meterlink.physics import calibrate
from meterlink.physics.certificate import KIND_DIPOLE, load_certificate
from meterlink.physics.units import Z0_OHM
from meterlink.station import derived
from meterlink.station.alarms import AlarmMachine, percent_rules_instantaneous
from meterlink.station.ingest import MeterState, Persist, _iso, band_reference
from meterlink.station.spectral import RATIO_BAND, SweepAssembler
from meterlink.station.stationfile import MeterConfig
from meterlink.storage.store import Store, StorageError, event_row


class Persistence:
    """Station and meter records, replay, and the commit of everything buffered."""

    def _station_record(self):
        st = self.st
        row = self.conn.execute("SELECT * FROM mon_station WHERE name=?", (st.name,)).fetchone()
        prev = None
        text = st.path.read_text(encoding="utf-8") if st.path.exists() else ""
        with self.store.write():
            if row is None:
                self.conn.execute("INSERT INTO mon_station (name, created_utc, runs) VALUES (?,?,0)",
                                  (st.name, time.time()))
            else:
                cols = [c[0] for c in self.conn.execute("SELECT * FROM mon_station LIMIT 0").description]
                prev = dict(zip(cols, row))
            self.conn.execute(
                "UPDATE mon_station SET config_path=?, config_text=?, standard=?, tier=?, convention=?, block_s=?, "
                "windows_s=?, latitude_deg=?, longitude_deg=?, elevation_m=?, timezone=?, started_utc=?, "
                "heartbeat_utc=?, pid=?, state='running', runs=runs+1 WHERE name=?",
                (str(st.path), text, st.standard, st.tier, st.convention, st.block_s, json.dumps(st.windows_s),
                 st.latitude_deg, st.longitude_deg, st.elevation_m, st.timezone, time.time(), time.time(),
                 os.getpid(), st.name))
            sid = self.conn.execute("SELECT id FROM mon_station WHERE name=?", (st.name,)).fetchone()[0]
            self.conn.execute("INSERT OR REPLACE INTO mon_storage VALUES (?, 1, NULL, NULL, 0, ?)", (sid, time.time()))
            # stored in the same transaction that marks this run as running: a kill at any later moment,
            # even before the first commit, can no longer lose them
            rows = []
            if prev and prev["state"] == "running":
                hb = prev["heartbeat_utc"]
                rows.append(self._event_row(None, "unclean_shutdown", "warning", f"previous run (pid {prev['pid']}) "
                                            f"ended without a clean stop; last heartbeat {_iso(hb)}", t=hb,
                                            last_heartbeat_utc=hb))
            rows.append(self._event_row(None, "monitor_started", "info", f"monitor of {st.name} started (run "
                                        f"{prev['runs'] + 1 if prev else 1})", pid=os.getpid()))
            Store._insert_events(self.conn, None, rows)
        return sid, prev

    def _meter(self, m: MeterConfig) -> MeterState:
        st = self.st
        cert = load_certificate(m.certificate)
        freq = st.meter_freq(m)
        e_ref, s_ref = band_reference(st.standard, st.tier, freq)
        row = self.conn.execute("SELECT session_id FROM mon_meter WHERE station_id=? AND meter=?",
                                (self.station_id, m.name)).fetchone()
        lo, hi = (freq if isinstance(freq, tuple) else (None, None))
        if row is None or row[0] is None:
            sid = self.store.begin_session("monitor", m.port, interval_ms=int(round(m.interval_s * 1000)),
                                           freq_hz=None if isinstance(freq, tuple) else freq, band_lo_hz=lo,
                                           band_hi_hz=hi, notes=f"station {st.name}, meter {m.name}")
        else:
            sid = int(row[0])
        with self.store.write():
            self.conn.execute("INSERT OR IGNORE INTO mon_meter (station_id, meter) VALUES (?,?)",
                              (self.station_id, m.name))
            self.conn.execute("UPDATE mon_meter SET session_id=?, port=?, certificate=?, freq_hz=?, band_lo_hz=?, "
                              "band_hi_hz=?, e_ref_v_per_m=?, s_ref_w_per_m2=?, cert_due=?, link_state=? "
                              "WHERE station_id=? AND meter=?",
                              (sid, m.port, m.certificate, None if isinstance(freq, tuple) else freq, lo, hi, e_ref,
                               s_ref, cert.due_date.isoformat() if cert.due_date else None, "connecting", self.station_id, m.name))
        dipole = cert.kind == KIND_DIPOLE
        top = math.nan if dipole else cert.level_range[1] * (Z0_OHM if cert.quantity == "H" else 1.0)
        ms = MeterState(m, cert, freq, e_ref, s_ref, sid, top)
        # a dipole meter reports one orientation per interval: a value per sweep of three
        hold = 3.0 * m.interval_s * (3 if dipole else 1)
        names = ("total", *(b[0] for b in m.bands), *((RATIO_BAND,) if dipole else ()))
        for band in names:
            ms.series[band] = derived.Series(hold, st.block_s, st.windows_s, st.min_coverage)
        if dipole:
            ms.sweeps = SweepAssembler(cert, m.bands, st.standard, st.tier)
        inst = percent_rules_instantaneous(st.standard, st.tier, freq)
        for rule in st.alarms:
            if not rule.meters or m.name in rule.meters:
                ms.alarms.append(AlarmMachine(rule, m.name, instantaneous=inst))
        h = st.health
        ms.checks = {"noise_floor": Persist("stuck_noise_floor", h.stuck_s),
                     "overrange": Persist("stuck_overrange", h.stuck_s),
                     "frozen": Persist("stuck_frozen", h.stuck_s)}
        self._replay(ms)
        return ms

    def _replay(self, ms: MeterState) -> None:
        """Rebuild windows, blocks in progress and alarm state from stored readings."""
        last_end = derived.last_final_block_end(self.conn, self.station_id, ms.cfg.name)
        t0 = None if last_end is None else last_end - max(self.st.windows_s) - 3.0 * ms.cfg.interval_s
        arr = self.store.readings(ms.session_id, t0=t0)
        saved = {(r[0]): r[1:] for r in self.conn.execute(
            "SELECT rule, state, t_on_utc, peak_t_utc, peak_value, last_t_utc FROM mon_alarm "
            "WHERE station_id=? AND meter=? AND band='total'", (self.station_id, ms.cfg.name))}
        for am in ms.alarms:
            if am.rule.name in saved:
                am.restore(*saved[am.rule.name])
        if ms.sweeps is not None:
            self._replay_spectra(ms, t0)
        elif len(arr):
            res = calibrate.calibrate_axes(ms.cert, arr.raw, ms.freq)
            self._feed(ms, arr.t_utc, res.e_v_per_m, res.flags, arr.raw, replay=True)
            ms.last_t = float(arr.t_utc[-1])
        if last_end is not None:   # blocks already stored stay as they are (the replay's first one is partial)
            ms.blocks_out = [(band, kept) for band, bl in ms.blocks_out
                             if (kept := [b for b in bl if b.t_start + b.block_s > last_end + 1e-6])]
        table = "spectra" if ms.sweeps is not None else "readings"
        last = self.conn.execute(f"SELECT max(t_utc) FROM {table} WHERE session_id=?", (ms.session_id,)).fetchone()[0]
        if last is not None:
            ms.last_t = float(last)

    def _replay_spectra(self, ms: MeterState, t0: float | None) -> None:
        rows = self.conn.execute(
            "SELECT s.id, s.boot, s.sweep, s.orientation, s.t_utc, l.freq_hz, l.level_dbuv FROM spectra s "
            "JOIN spectrum_lines l ON l.spectrum_id = s.id WHERE s.session_id=? AND s.t_utc >= ? "
            "ORDER BY s.t_utc, s.id, l.id", (ms.session_id, -math.inf if t0 is None else t0)).fetchall()
        i = 0
        while i < len(rows):
            j = i
            while j < len(rows) and rows[j][0] == rows[i][0]:
                j += 1
            _, boot, sweep, o, t, *_ = rows[i]
            v = ms.sweeps.add(boot, sweep, o, t, [r[5] for r in rows[i:j]], [r[6] for r in rows[i:j]])
            if v is not None:
                self._feed_sweep(ms, v, replay=True)
            i = j

    def _commit(self, force: bool = False) -> bool:
        """One transaction: buffered readings/status/events of every meter, derived rows, alarm state.

        Nothing leaves memory before its transaction commits. A commit that fails (a full disk, an
        I/O error) keeps every batch, raises a storage_failed health event and the alarm hooks once,
        marks the station as not storing, and is retried with back-off (1 s doubling to 60 s); the
        batches go in with the first commit that works. Returns whether this call stored them.

        A meter's rows go in once the oldest of them is store_s old (commit_s for a small station:
        one insert per meter per commit costs more than its readings on a large one), and whenever
        derived blocks or a new connection of that meter are to be stored with them.
        """
        fail = self._store_fail
        if fail is not None and not force and time.monotonic() < fail["next_mono"]:
            return False
        now = time.time()
        every = force or fail is not None
        chosen = [ms for ms in self.meters if every or ms.blocks_out or ms.session_update or ms.writer.due()]
        taken = [ms.writer.take() for ms in chosen]
        try:
            with self.store.write():
                for ms, buf in zip(chosen, taken):
                    ms.writer.write_taken(buf)
                    for band, blocks in ms.blocks_out:
                        derived.save_blocks(self.conn, self.station_id, ms.cfg.name, band, blocks, self.st.min_coverage)
                    if ms.session_update:
                        sets = ", ".join(f"{k}=?" for k in ms.session_update)
                        self.conn.execute(f"UPDATE sessions SET {sets} WHERE id=?",
                                          (*ms.session_update.values(), ms.session_id))
                    for am in ms.alarms:
                        self.conn.execute("INSERT OR REPLACE INTO mon_alarm VALUES (?,?,?,?,?,?,?,?,?)",
                                          (self.station_id, am.rule.name, ms.cfg.name, am.band, *am.snapshot()))
                    self.conn.execute("UPDATE mon_meter SET last_seen_utc=?, link_state=?, battery_pct=?, "
                                      "temperature_degc=?, drift_ppm=?, last_e_v_per_m=?, u_expanded_db=? "
                                      "WHERE station_id=? AND meter=?",
                                      (ms.last_t, ms.link_state, ms.status.get("battery_pct"),
                                       ms.status.get("temperature_degc"), ms.drift_ppm, ms.last_e, ms.last_u_db,
                                       self.station_id, ms.cfg.name))
                if self._station_events:
                    for sid, row in self._station_events:
                        self.store.write_batch(sid, events=[row])
                if fail is not None:
                    self.conn.execute("UPDATE mon_storage SET storing=1, since_utc=NULL, error=NULL, pending_readings=0, "
                                      "checked_utc=? WHERE station_id=?", (now, self.station_id))
                    # in the same transaction as the batches it speaks of
                    Store._insert_events(self.conn, None, [self._recovered_row(fail)])
                if fail is not None or now >= self._heartbeat_next:  # every station.heartbeat_s (host time)
                    self.conn.execute("UPDATE mon_station SET heartbeat_utc=? WHERE id=?", (now, self.station_id))
                    self._heartbeat_next = now + self.st.heartbeat_s
        except (sqlite3.DatabaseError, StorageError) as exc:
            for ms, buf in zip(chosen, taken):
                ms.writer.put_back(buf, exc)
            self._storage_failed(exc)
            return False
        for ms in chosen:
            ms.writer.stored()
            ms.blocks_out = []
            ms.session_update = {}
        self._station_events = []
        if fail is not None:
            self._storage_recovered(fail)
        return True

    def _storage_failed(self, exc: BaseException) -> None:
        """A commit failed: keep everything, say so (log, status, alarm hooks) once, retry later."""
        pending = sum(ms.writer.pending_readings for ms in self.meters)
        fail = self._store_fail
        if fail is None:
            fail = self._store_fail = {"since_utc": time.time(), "error": f"{type(exc).__name__}: {exc}",
                                       "attempts": 0, "delay_s": 1.0, "next_mono": 0.0}
            self._event(None, "storage_failed", "error", f"cannot write {self.st.database}: {fail['error']}; "
                        "readings are kept in memory and the commit retried", error=fail["error"])
            self._storage_alarm("start", fail["since_utc"], pending)
        fail["attempts"] += 1
        fail["next_mono"] = time.monotonic() + fail["delay_s"]
        fail["delay_s"] = min(2.0 * fail["delay_s"], 60.0)
        # moving the write-ahead log into the file and truncating it may free room for the small update
        # below, which tells `status` that the station is not storing
        self.store.make_room()
        try:
            with self.store.write():
                self.conn.execute("UPDATE mon_storage SET storing=0, since_utc=?, error=?, pending_readings=?, "
                                  "checked_utc=? WHERE station_id=?",
                                  (fail["since_utc"], fail["error"], pending, time.time(), self.station_id))
        except (sqlite3.DatabaseError, StorageError):
            pass

    def _recovered_row(self, fail: dict) -> dict:
        dropped = sum(ms.writer.dropped for ms in self.meters)
        msg = (f"storing again after {time.time() - fail['since_utc']:.0f} s and {fail['attempts']} failed commit(s); "
               "readings kept meanwhile are stored"
               + (f", {dropped} dropped beyond the memory bound (see readings_dropped)" if dropped else ""))
        return event_row("storage_recovered", "info", msg, self.now_utc(), station=self.st.name,
                         attempts=fail["attempts"], since_utc=fail["since_utc"], dropped=dropped)

    def _storage_recovered(self, fail: dict) -> None:
        self._store_fail = None
        self.log(f"{_iso(self.now_utc())} INFO    storage_recovered: storing again after {fail['attempts']} failed "
                 "commit(s)")
        self._storage_alarm("end", fail["since_utc"], 0)

    def _final_commit(self, tries: int = 4) -> None:
        """Store everything left and mark the station stopped; if the file still cannot be written after
        a few short tries, say exactly what is lost (the log is then the only record left)."""
        for k in range(tries):
            if self._commit(force=True):
                break
            time.sleep(0.25 * (k + 1))  # back-off before retrying a failed commit at shutdown
        else:
            lost = {ms.cfg.name: ms.writer.pending_readings for ms in self.meters}
            self.log(f"{_iso(time.time())} ERROR   not_stored: {self.st.database} cannot be written "
                     f"({self._store_fail['error'] if self._store_fail else '?'}); readings not stored at stop: "
                     + ", ".join(f"{m} {n}" for m, n in lost.items()))
            return
        try:
            with self.store.write():
                self.conn.execute("UPDATE mon_station SET state='stopped', heartbeat_utc=? WHERE id=?",
                                  (time.time(), self.station_id))
        except (sqlite3.DatabaseError, StorageError) as exc:
            self.log(f"{_iso(time.time())} ERROR   cannot mark the station stopped: {exc}")


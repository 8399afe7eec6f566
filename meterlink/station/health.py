"""The monitor's health duties besides the readings: certificate due dates, alarm-command outcomes,
the not-storing alarm, and retention (thinning old rows one chunk per commit tick).

``Health`` is a part of :class:`meterlink.station.monitor.Monitor`.
"""

from __future__ import annotations

import datetime as _dt
import time

from meterlink.physics.certificate import certificate_status
from meterlink.station import retention
from meterlink.station.alarms import AlarmEvent, command_call
from meterlink.station.ingest import _iso


class Health:
    """Certificates, alarm commands, the storage alarm and retention."""

    def _storage_alarm(self, kind: str, since_utc: float, pending: int) -> None:
        """Run each alarm rule's command once for the station not storing (rule name ``not_storing``)."""
        done = set()
        for rule in self.st.alarms:
            if not rule.command or rule.command in done:
                continue
            done.add(rule.command)
            ev = AlarmEvent(kind=kind, rule="not_storing", meter="*", band="storage", t_utc=time.time(),
                            value=float(pending), unit=rule.unit, threshold=0.0, clear=0.0, window_s=0.0,
                            episode_start_utc=since_utc, peak_t_utc=time.time(), peak_value=float(pending))
            args, env = command_call(rule.command, ev, self.st.name)
            self.hooks.start(args, env, rule.command_timeout_s, label=f"station/not_storing/{kind}")

    def _certificates(self) -> None:
        today = _dt.date.fromtimestamp(self.now_utc())
        if self._day_checked == today.isoformat():
            return
        self._day_checked = today.isoformat()
        for ms in self.meters:
            if ms.cert.due_date is None:        # no due date stated: the operator's calibration programme decides
                continue
            days = (ms.cert.due_date - today).days
            if days < 0:
                self._event(ms, "certificate_expired", "error", "; ".join(certificate_status(ms.cert, today)),
                            due_date=ms.cert.due_date.isoformat())
            elif days <= self.st.health.cert_warn_days:
                self._event(ms, "certificate_due_soon", "warning", f"certificate due on "
                            f"{ms.cert.due_date.isoformat()} ({days} days)", due_date=ms.cert.due_date.isoformat())

    def _retention(self) -> None:
        """Thin every growing table to its age limit (meterlink/station/retention.py), one chunk per commit tick."""
        keep = self.st.retention
        if not self._retention_todo:
            if time.monotonic() < self._retention_next:
                return
            self._retention_next = time.monotonic() + keep.check_every_s
            self._retention_todo = retention.plan(
                self.conn, keep, self.station_id, [(ms.cfg.name, ms.session_id, ms.cfg.interval_s) for ms in self.meters],
                self.now_utc(), max(self.st.windows_s))
            return
        task = self._retention_todo[0]
        if task.step(self.store, keep.chunk_rows) < keep.chunk_rows:
            self._retention_todo.pop(0)
            if task.removed:
                ms = next((m for m in self.meters if m.cfg.name == task.meter), None)
                what = {"readings": "raw reading(s)", "status": "status row(s)", "events": "event(s)",
                        "derived": "derived row(s) (blocks and running averages)"}[task.table]
                self._event(ms, "retention", "info", f"{task.removed} {what} before {_iso(task.before_utc)} deleted"
                            + (" (the derived series keeps them)" if task.table == "readings" else ""),
                            table=task.table, removed=task.removed, before_utc=task.before_utc)

    def _hook_outcomes(self, outcomes) -> None:
        """Alarm commands that ended badly become events (a clean exit 0 is not recorded)."""
        for o in outcomes:
            who = f"{o.argv0} ({o.label}{f', pid {o.pid}' if o.pid else ''})"
            detail = {"hook": o.label, "command": o.argv0, "pid": o.pid, "returncode": o.returncode,
                      "duration_s": round(o.duration_s, 3), "timeout_s": o.timeout_s}
            if o.kind == "timeout":
                self._event(None, "alarm_command_timeout", "error", f"{who} still running after {o.timeout_s:g} s: "
                            "its process group was killed", **detail)
            elif o.kind == "killed_at_stop":
                self._event(None, "alarm_command_timeout", "warning", f"{who} still running when the monitor "
                            "stopped: its process group was killed", at_stop=True, **detail)
            elif o.kind in ("not_started", "skipped"):
                self._event(None, "alarm_command_failed", "error", f"{who} not run: {o.error}", **detail)
            elif o.returncode:
                self._event(None, "alarm_command_failed", "warning", f"{who} exited with status {o.returncode}",
                            **detail)


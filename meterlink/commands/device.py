"""``meterlink device``: show and change a meter's settings, set or check its calendar clock.

``show`` reads IDENT, STATUS and every setting; ``set KEY VALUE`` writes one setting;
``clock`` reports the device clock's offset from host UTC, ``clock --set`` sets it first. Each
change is stored as an event (setting_changed, clock_set) with old and new values, in a small
session of kind 'device' tied to the device's row.
"""

from __future__ import annotations

HELP = "show or change a meter's settings and calendar clock (changes are logged in the database)"

DEFAULT_DB = "meterlink.db"
WRITABLE = ("interval_ms", "device_averaging", "probe_serial", "cert_ref", "asset_tag")


def add_arguments(parser) -> None:
    sub = parser.add_subparsers(dest="action", metavar="ACTION", required=True)

    def common(p, db: bool) -> None:
        p.add_argument("--port", metavar="PORT", required=True, help="serial device or pyserial URL")
        if db:
            p.add_argument("--db", metavar="FILE", default=DEFAULT_DB,
                           help=f"database where the change is logged (default: {DEFAULT_DB})")
        p.add_argument("--json", action="store_true", help="print machine-readable JSON")

    text = "identification, status and every setting"
    common(sub.add_parser("show", help=text, description=text), db=False)
    text = f"write one setting: {', '.join(WRITABLE)}"
    p = sub.add_parser("set", help=text, description=text)
    p.add_argument("key", metavar="KEY", help=", ".join(WRITABLE))
    p.add_argument("value", metavar="VALUE", help="a whole number, or text of printable ASCII up to 32 characters")
    common(p, db=True)
    text = "report the device clock's offset from host UTC; --set to set it first"
    p = sub.add_parser("clock", help=text, description=text)
    p.add_argument("--set", action="store_true", help="set the device clock to host UTC (CLOCK_SET), then check")
    common(p, db=True)


def parse_setting(key: str, value: str):
    """(SettingKey, value) for a writable key; MeterlinkError naming the key or value if unusable."""
    from meterlink.errors import MeterlinkError
    from meterlink.device.protocol import MAX_TEXT, SettingKey

    name = str(key).strip().lower().replace("-", "_")
    if name not in WRITABLE:
        extra = " (set the clock with 'meterlink device clock --set')" if name == "clock_utc" else ""
        raise MeterlinkError(f"setting {key!r} is not writable; expected one of {', '.join(WRITABLE)}{extra}")
    k = SettingKey[name.upper()]
    if k in (SettingKey.INTERVAL_MS, SettingKey.DEVICE_AVERAGING):
        try:
            v = int(value)
        except (TypeError, ValueError):
            raise MeterlinkError(f"{name} {value!r} is not a whole number") from None
        if not 0 < v < 1 << 32:
            raise MeterlinkError(f"{name} {value!r} must be between 1 and 4294967295")
        return k, v
    if len(value) > MAX_TEXT or not all(0x20 <= ord(ch) <= 0x7E for ch in value):
        raise MeterlinkError(f"{name} {value!r} must be printable ASCII of at most {MAX_TEXT} characters")
    return k, value


def _show_value(v) -> str:
    from rich.markup import escape

    from meterlink.device.link import safe_text

    return escape(safe_text(v)) if isinstance(v, str) else str(v)


def _device_session(store, ident, port: str, note: str) -> int:
    dev = store.device_id(ident.model, ident.serial, ident.probe_serial, ident.cert_ref, ident.sensor_kind,
                          f"{ident.fw_major}.{ident.fw_minor}.{ident.fw_patch}",
                          f"{ident.proto_major}.{ident.proto_minor}")
    return store.begin_session("device", port=port, device_id=dev, notes=note)


def clock_offset(commander) -> dict:
    """Read clock_utc and compare it with host UTC at the midpoint of the exchange.

    The device reports whole seconds (floor of its clock), so its clock is taken as value + 0.5 s
    and the offset is uncertain by about +-0.5 s plus half the round trip.
    """
    import time

    from meterlink.device.protocol import SettingKey

    t0 = time.time()
    dev_s = commander.get_setting(SettingKey.CLOCK_UTC)
    t1 = time.time()
    host = (t0 + t1) / 2
    res = round(0.5 + (t1 - t0) / 2, 3)
    if not isinstance(dev_s, int) or dev_s == 0:
        return {"device_utc": None, "host_utc": iso_utc(host, 3), "device_utc_s": dev_s, "host_utc_s": round(host, 3),
                "offset_s": None, "resolution_s": res}
    return {"device_utc": iso_utc(dev_s), "host_utc": iso_utc(host, 3), "device_utc_s": dev_s,
            "host_utc_s": round(host, 3), "offset_s": round(dev_s + 0.5 - host, 3), "resolution_s": res}


def iso_utc(t_s: float, digits: int = 0) -> str:
    """ISO 8601 UTC for a person to read (seconds, or milliseconds with digits=3), e.g. 2026-12-03T13:50:12Z."""
    import datetime as _dt

    d = _dt.datetime.fromtimestamp(t_s, _dt.timezone.utc)
    return d.isoformat(timespec="milliseconds" if digits else "seconds").replace("+00:00", "Z")


def run(args) -> int:

    from meterlink.reports import digits
    import time

    from rich.console import Console
    from rich.table import Table

    from meterlink.device.commander import Commander
    from meterlink.device.protocol import SettingKey
    from meterlink.device.transport import open_link

    if args.action == "set":
        key, value = parse_setting(args.key, args.value)  # before touching the port
    con = Console()
    link = open_link(args.port)
    try:
        c = Commander(link)
        ident = c.who()
        if args.action == "show":
            status = c.status()
            settings = {k.name.lower(): c.get_setting(k) for k in SettingKey}
            if args.json:
                from dataclasses import asdict
                print(digits.dumps({"ident": asdict(ident), "status": asdict(status), "settings": settings}, indent=2))
                return 0
            t = Table("field", "value", title="device", title_justify="left")
            for name in ("model", "serial", "probe_serial", "cert_ref"):
                t.add_row(name, _show_value(getattr(ident, name)))
            t.add_row("firmware", f"{ident.fw_major}.{ident.fw_minor}.{ident.fw_patch}")
            t.add_row("protocol", f"{ident.proto_major}.{ident.proto_minor}")
            t.add_row("battery", f"{status.battery_mv} mV" + (f", {status.battery_pct} %" if status.battery_pct <= 100 else ""))
            t.add_row("temperature", f"{status.temp_centi_c / 100:.2f} degC")
            for name, v in settings.items():
                t.add_row(f"setting {name}", _show_value(v))
            con.print(t)
            return 0

        from meterlink.storage.store import Store

        with Store(args.db) as store:
            if args.action == "set":
                old = c.get_setting(key)
                new = c.put_setting(key, value)
                sid = _device_session(store, ident, link.port, f"meterlink device set {key.name.lower()}")
                store.add_event(sid, "setting_changed", "info", f"{key.name.lower()}: {old!r} -> {new!r}",
                                key=key.name.lower(), old=old, new=new, asked=value, serial=ident.serial)
                store.end_session(sid)
                out = {"key": key.name.lower(), "old": old, "new": new, "asked": value}
                if args.json:
                    print(digits.dumps(out, indent=2))
                else:
                    con.print(f"{key.name.lower()}: {_show_value(old)} -> {_show_value(new)}")
                    if new != value:
                        con.print(f"[yellow]the device holds {_show_value(new)}, not the value asked for[/]")
                return 0
            before = clock_offset(c)
            out = {"before": before}
            if args.set:
                now = time.time()
                c.clock_set(int(now), int(now % 1 * 1000))
                after = clock_offset(c)
                out["after"] = after
                sid = _device_session(store, ident, link.port, "meterlink device clock --set")
                store.add_event(sid, "clock_set", "info", f"device clock set to host UTC {iso_utc(now, 3)}",
                                old=before["device_utc_s"], new=after["device_utc_s"], set_to_utc_s=now,
                                offset_before_s=before["offset_s"], offset_after_s=after["offset_s"],
                                serial=ident.serial)
                store.end_session(sid)
    finally:
        link.close()
    if args.json:
        print(digits.dumps(out, indent=2))
        return 0
    for label, r in out.items():
        if r["offset_s"] is None:
            con.print(f"{label}: device clock not set (clock_utc {r['device_utc_s']}); host {r['host_utc']}")
        else:
            con.print(f"{label}: device {r['device_utc']}, host {r['host_utc']}, offset {r['offset_s']:+.1f} s "
                      f"(+-{r['resolution_s']:.1f} s: the device reports whole seconds)")
    return 0

"""Interactive survey at the terminal: the choices first, then point after point (rich.prompt).

``ask(prompt, default=None, choices=None) -> str`` is passed in so the dialogue can be scripted in
tests; by default it is rich.prompt.Prompt.ask on the given console.
"""

from __future__ import annotations

import dataclasses

from meterlink.errors import MeterlinkError
from meterlink.survey.model import MODES
from meterlink.survey.plan import PlanError, _Ctx, _point, load_plan
from meterlink.survey.spatial import SCHEMES


def rich_ask(console):
    from rich.prompt import Prompt
    from rich.text import Text

    def ask(prompt, default=None, choices=None):    # Text: a label like "gate [north]" is not markup
        return Prompt.ask(Text(prompt), default=default, choices=choices, console=console)
    return ask


def matching_certificate(ident) -> str | None:
    """Name of the packaged certificate for the meter's probe serial, else one of its sensor kind."""
    from meterlink.physics.certificate import KIND_DIPOLE, load_certificate, packaged_certificates
    from meterlink.device.protocol import SensorKind

    certs = [(name, load_certificate(name)) for name in packaged_certificates()]
    for name, cert in certs:
        if ident is not None and cert.serial == ident.probe_serial:
            return name
    want_dipole = ident is not None and ident.sensor_kind == SensorKind.DIPOLE_RX
    for name, cert in certs:
        if (cert.kind == KIND_DIPOLE) == want_dipole:
            return name
    return None


def identify(port: str):
    """The meter's IDENT, asked once before the dialogue so defaults can fit it (None if no answer)."""
    from meterlink.device.commander import Commander
    from meterlink.device.transport import open_link

    link = open_link(port)
    try:
        return Commander(link).who()
    except MeterlinkError:
        return None
    finally:
        link.close()


def _until(ask, console, prompt: str, parse, default=None):
    """Ask until parse(answer) gives a value; a bad entry is shown (one line) and asked again."""
    while True:
        answer = ask(prompt, default=default)
        try:
            return parse(answer)
        except ValueError as exc:
            msg = f"interactive entry: {exc}" if str(exc) else "interactive entry: expected a number"
        except MeterlinkError as exc:
            msg = str(exc)
        if console is not None:
            from rich.markup import escape
            console.print(f"[red]{escape(msg)}[/red]")


def _mhz(text: str) -> float:
    try:
        v = float(text) * 1e6
    except ValueError:
        raise ValueError(f"{text!r} is not a frequency in MHz") from None
    if not v > 0:
        raise ValueError(f"{text!r} is not a positive frequency")
    return v


def _frequency(text: str) -> dict:
    """'' -> {}, '900' -> freq_hz, '80-6000' -> band_hz (MHz entered, Hz kept)."""
    text = text.strip()
    if not text:
        return {}
    if "-" in text.lstrip("-"):
        lo, hi = text.split("-", 1)
        band = [_mhz(lo.strip()), _mhz(hi.strip())]
        if not band[0] < band[1]:
            raise ValueError(f"band {text!r}: the low end must be below the high end")
        return {"band_hz": band}
    return {"freq_hz": _mhz(text)}


def _optional_w(text: str):
    return float(text) if text.strip() else None


def ask_sources(ask, console=None) -> list[dict]:
    """The site's transmitters (name, frequency, technology, powers) until an empty name, as [[source]] tables."""
    out = []
    while (name := ask(f"Source {len(out) + 1} name (empty: no more sources)", default="")).strip():
        d = {"name": name, "freq_hz": _until(ask, console, "  frequency (MHz)", _mhz)}
        tech = ask("  technology", default="")
        if tech:
            d["technology"] = tech
        while True:
            p = _until(ask, console, "  power during the survey (W; empty: unknown)", _optional_w, "")
            pm = _until(ask, console, "  maximum power (W; empty: unknown)", _optional_w, "")
            try:
                _sources_ok({"name": name, "freq_hz": d["freq_hz"], "power_w": p, "max_power_w": pm})
                break
            except MeterlinkError as exc:
                if console is not None:
                    from rich.markup import escape
                    console.print(f"[red]{escape(str(exc))}[/red]")
        d.update({k: v for k, v in (("power_w", p), ("max_power_w", pm)) if v is not None})
        out.append(d)
    return out


def _sources_ok(d: dict) -> None:
    """The plan's own check of one source (bounds, maximum not below the power)."""
    load_plan({"survey": {"standard": "icnirp-2020", "rule": "simple", "certificate": "x"}, "site": {"name": "x"},
               "source": [{k: v for k, v in d.items() if v is not None}]}, check_photos=False)


def _direction(text: str):
    if not text.strip():
        return None
    v = float(text)
    if not 0 <= v <= 360:
        raise ValueError(f"direction {text!r} must be from 0 to 360 degrees")
    return v


def ask_photos(ask, label: str, console=None) -> list[dict]:
    """Photos of a point until an empty entry, as plan entries {file, caption, direction_deg}; each file
    must exist and be a PNG or JPEG image."""
    from pathlib import Path

    from meterlink.survey.photos import read_photo

    def photo(text):
        if not text.strip():
            return None
        read_photo(text.strip(), label)
        return str(Path(text.strip()).resolve())
    out = []
    while (f := _until(ask, console, f"Photo of {label!r} (image file; empty: no more)", photo, "")) is not None:
        d = {"file": f, "caption": ask("  caption: what it shows (empty: none)", default="").strip() or None,
             "direction_deg": _until(ask, console, "  direction of view, degrees from north (empty: not noted)",
                                     _direction, "")}
        out.append({k: v for k, v in d.items() if v is not None})
    return out


def _photo(d: dict):
    from meterlink.survey.model import Photo

    return Photo(d["file"], d.get("caption", ""), d.get("direction_deg"))


def _temperature(text: str):
    if not text.strip():
        return None
    v = float(text)
    if not -60 <= v <= 70:
        raise ValueError(f"air temperature {text!r} must be from -60 to 70 degC")
    return v


def _percent(text: str):
    if not text.strip():
        return None
    v = float(text)
    if not 0 <= v <= 100:
        raise ValueError(f"relative humidity {text!r} must be from 0 to 100 %")
    return v


def ask_conditions(ask, console=None) -> dict:
    """Weather and site conditions, and the transmitter state confirmed with the operator, as the plan's
    [conditions] and [transmitter] tables (absent when nothing was given)."""
    cond = {"weather": ask("Weather and site conditions (empty: not recorded)", default="").strip() or None,
            "temperature_degc": _until(ask, console, "  air temperature (degC; empty: not noted)", _temperature, ""),
            "humidity_percent": _until(ask, console, "  relative humidity (%; empty: not noted)", _percent, "")}
    out = {}
    if any(v is not None for v in cond.values()):
        out["conditions"] = {k: v for k, v in cond.items() if v is not None}
    who = ask("Transmitter state confirmed with (operator's contact; empty: not confirmed)", default="").strip()
    if who:
        out["transmitter"] = {"confirmed_with": who,
                              "confirmed_at": _until(ask, console, "  confirmed when (date and time)", _nonempty, ""),
                              "state": _until(ask, console, "  state confirmed (e.g. maximum power, all sectors on "
                                              "air)", _nonempty, "")}
    return out


def _nonempty(text: str) -> str:
    if not text.strip():
        raise MeterlinkError("interactive entry: this needs an answer")
    return text.strip()


def ask_plan(ask, ident=None, console=None, load_declared=None) -> dict:
    """The survey header as a plan dict: site, standard, tier, rule, certificate, follow-up, declared
    frequency or band, the sources and their powers, a sources file for predicted values, and the
    report's number and sign-off: what a plan file can say before its points."""
    from meterlink.physics.certificate import packaged_certificates
    from meterlink.physics.limits import standards
    from meterlink.physics.verdict import RULES

    site = ask("Site name")
    tech = ask("Technician", default="")
    std = ask("Standard", default="icnirp-2020", choices=standards())
    tier = ask("Tier", default="public", choices=["public", "occupational"])
    rule = ask("Decision rule (fixed for the whole survey)", default="guarded", choices=list(RULES))
    certs = packaged_certificates()
    cert = ask("Certificate (name or file)", default=matching_certificate(ident) or (certs[0] if certs else None))
    follow = ask("Follow-up threshold, percent of the E reference level", default="20")
    doc = {"survey": {"standard": std, "tier": tier, "rule": rule, "certificate": cert},
           "site": {"name": site, "technician": tech}}
    try:
        doc["survey"]["followup_percent"] = float(follow)
    except ValueError:
        raise PlanError(f"interactive entry: follow-up threshold {follow!r} is not a number") from None
    doc["survey"].update(_until(ask, console, "Declared frequency in MHz, or band as low-high "
                                "(empty: the certificate's range)", _frequency, ""))
    sources = ask_sources(ask, console)
    if sources:
        doc["source"] = sources
    doc.update(ask_conditions(ask, console))
    if load_declared is not None:
        def sources_file(text):
            if not text.strip():
                return ""
            from pathlib import Path
            load_declared(text.strip())
            return str(Path(text.strip()).resolve())
        path = _until(ask, console, "Sources file for predicted values (empty: none)", sources_file, "")
        if path:
            doc["survey"]["sources_file"] = path
            doc["survey"]["prediction_u_db"] = _until(
                ask, console, "Expanded uncertainty of a predicted field (dB, k = 2)", float, "3")
    number = ask("Report number (empty: give it later with 'meterlink render --report-number')", default="")
    if number.strip():
        doc["report"] = {"number": number}
        for key, prompt in (("assessor", "Assessor"), ("qualification", "Assessor's qualification"),
                            ("organisation", "Organisation"), ("date", "Report date"),
                            ("reviewer", "Checked by (reviewer; empty: not yet)")):
            v = ask(prompt, default="")
            if v:
                doc["report"][key] = v
        if doc["report"].get("reviewer"):
            for key, prompt in (("reviewer_qualification", "  reviewer's qualification"), ("review_date", "  review date")):
                v = ask(prompt, default="")
                if v:
                    doc["report"][key] = v
    return doc


def ask_point(ask, n: int, console=None):
    """The next point as (Point, its plan table), or None when the technician is done (an empty label,
    or Ctrl-D at any of the point's questions); re-asks after a bad entry."""
    try:
        return _ask_point(ask, n, console)
    except EOFError:
        return None


def _position(text: str):
    if not text.strip():
        return {}
    parts = text.replace(";", ",").split(",")
    if len(parts) != 2:
        raise ValueError(f"position {text!r}: give x, y in metres")
    return {"x_m": float(parts[0]), "y_m": float(parts[1])}


def _ask_point(ask, n: int, console=None):
    while True:
        label = ask(f"Point {n} label (empty to finish)", default="")
        if not label.strip():
            return None
        d = {"label": label, "mode": ask("Mode", default="spot", choices=[m for m in MODES if m != "selective"])}
        try:
            d["height_m"] = float(ask("Height above ground (m)", default="1.5"))
            if d["mode"] == "spatial":
                d["scheme"] = ask("Scheme", default="three-heights", choices=list(SCHEMES))
                if d["scheme"] == "vertical-line":
                    d["n"] = int(ask("Number of heights from 0.2 to 1.8 m", default="5"))
                elif d["scheme"] == "custom":
                    d["heights_m"] = [float(x) for x in ask("Heights (m), comma separated").split(",")]
            d.update(_position(ask("Position x, y in site metres (empty: none)", default="")))
            dur = ask("Duration in device seconds (empty: the mode's default)", default="")
            if dur.strip():
                d["duration_s"] = float(dur)
            notes = ask("Notes", default="")
            if notes:
                d["notes"] = notes
            p = _point(_Ctx("interactive entry"), d, n)
            photos = ask_photos(ask, label, console)
            if photos:       # a photo with neither caption nor direction stays a plain file name
                d["photos"] = [ph if len(ph) > 1 else ph["file"] for ph in photos]
            return dataclasses.replace(p, photos=tuple(_photo(ph) for ph in photos)), d
        except ValueError as exc:
            msg = f"interactive entry: {exc}" if "position" in str(exc) else "interactive entry: expected a number"
        except MeterlinkError as exc:
            msg = str(exc)
        if console is not None:
            from rich.markup import escape
            console.print(f"[red]{escape(msg)}[/red]")


def ask_redo(ask, measured: dict, console=None):
    """After a point: (label, reason, photos) of a point to measure again, or None to go on. The point is
    the one just taken or an earlier one (by label or number); the reason is required."""
    by_no = {str(i): lb for i, lb in enumerate(measured, 1)}

    def which(text):
        key = text.strip()
        if not key:
            return ""
        if key in measured:
            return key
        if key in by_no:
            return by_no[key]
        raise MeterlinkError(f"no point {key!r} measured yet (points: {', '.join(measured)})")
    last = list(measured)[-1]
    label = _until(ask, console, f"Measure a point again? (Enter: go on; 'r': {last!r} again; or its label or number)",
                   lambda t: which(last if t.strip().lower() == "r" else t), "")
    if not label:
        return None

    def reason(text):
        if not text.strip():
            raise MeterlinkError(f"point {label!r}: a re-measurement needs its reason")
        return text.strip()
    why = _until(ask, console, f"Reason for measuring {label!r} again", reason, "")
    return label, why, [_photo(ph) for ph in ask_photos(ask, label, console)]


def run_interactive(port: str, db_path, *, console=None, ask=None, mover=None, load_declared=None,
                    **link_options) -> int:
    """Ask for the survey's choices, then measure points until an empty label, offering after each to
    measure a point again; returns the session id. The answers are stored as the survey's plan text
    (one [[point]] per point as it is measured), so the record reads like a scripted survey's.
    load_declared(path) reads a sources file for predicted values (the planning layer's load_site)."""
    from meterlink.storage.store import Store
    from meterlink.survey import store as sstore
    from meterlink.survey.plan import dump_plan
    from meterlink.survey.readout import LiveReadout
    from meterlink.survey.run import Survey

    ask = ask or rich_ask(console)
    ident = identify(port)
    if console is not None and ident is not None:
        from rich.markup import escape

        from meterlink.safetext import clean_text
        console.print(f"meter: {escape(clean_text(ident.model))} serial {escape(clean_text(ident.serial))}, "
                      f"probe {escape(clean_text(ident.probe_serial))}")
    try:
        doc = ask_plan(ask, ident, console, load_declared)
    except EOFError:
        raise MeterlinkError("input ended before the survey's choices were complete: nothing was recorded") from None
    plan = dataclasses.replace(load_plan(doc), source_text=dump_plan(doc))
    declared = load_declared(plan.sources_file) if plan.sources_file else None
    live = None

    def ready(point, height_m):
        with live.paused():     # the prompt must be seen, not drawn over by the panel
            ask(f"Hold the probe at {point.label!r}, {height_m:.2f} m, then press Enter", default="")

    def measure(p, reason=None):
        nonlocal live
        with LiveReadout(console) as live:
            sv.capture.on_view = live.update
            res = sv.measure(p, reason)
        live.point_done(res)

    measured = {}           # label -> Point, in the order measured
    with Store(db_path) as store:
        with Survey(store, port, plan, mover=mover, ready=ready, declared=declared, **link_options) as sv:
            n = 1
            while (entry := ask_point(ask, n, console)) is not None:
                p, table = entry
                if p.label in measured:
                    if console is not None:
                        from rich.markup import escape
                        console.print(f"[red]point {escape(p.label)!r} is already measured: to measure it again, "
                                      "answer the question after a point[/red]")
                    continue
                try:
                    measure(p)
                except EOFError:    # Ctrl-D at "hold the probe": end here, the points measured are kept
                    break
                measured[p.label] = p
                doc.setdefault("point", []).append(table)
                sstore.set_plan_text(store, sv.session_id, dump_plan(doc))
                n += 1
                try:
                    while (redo := ask_redo(ask, measured, console)) is not None:
                        label, reason, photos = redo
                        measure(dataclasses.replace(measured[label], photos=tuple(photos)), reason)
                except EOFError:
                    break
            if console is not None:
                console.print(f"survey closed after {len(measured)} point(s)")
            return int(sv.session_id)

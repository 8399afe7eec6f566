"""Interactive survey at the terminal: the choices first, then point after point (rich.prompt).

``ask(prompt, default=None, choices=None) -> str`` is passed in so the dialogue can be scripted in
tests; by default it is rich.prompt.Prompt.ask on the given console.
"""

from __future__ import annotations

from meterlink.errors import MeterlinkError
from meterlink.survey.model import MODES
from meterlink.survey.plan import PlanError, _Ctx, _point, load_plan
from meterlink.survey.spatial import SCHEMES


def rich_ask(console):
    from rich.prompt import Prompt

    def ask(prompt, default=None, choices=None):
        return Prompt.ask(prompt, default=default, choices=choices, console=console)
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


def ask_plan(ask, ident=None) -> dict:
    """The survey header (site, standard, tier, rule, certificate, follow-up) as a plan dict."""
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
    return doc


def ask_point(ask, n: int, console=None):
    """The next point, or None when the technician is done (an empty label, or Ctrl-D at any of
    the point's questions); re-asks after a bad entry."""
    try:
        return _ask_point(ask, n, console)
    except EOFError:
        return None


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
            dur = ask("Duration in device seconds (empty: the mode's default)", default="")
            if dur.strip():
                d["duration_s"] = float(dur)
            notes = ask("Notes", default="")
            if notes:
                d["notes"] = notes
            return _point(_Ctx("interactive entry"), d, n)
        except ValueError:
            msg = "interactive entry: expected a number"
        except MeterlinkError as exc:
            msg = str(exc)
        if console is not None:
            console.print(f"[red]{msg}[/red]")


def run_interactive(port: str, db_path, *, console=None, ask=None, mover=None, **link_options) -> int:
    """Ask for the survey's choices, then measure points until an empty label; returns the session id."""
    from meterlink.storage.store import Store
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
        plan = load_plan(ask_plan(ask, ident))
    except EOFError:
        raise MeterlinkError("input ended before the survey's choices were complete: nothing was recorded") from None
    live = None

    def ready(point, height_m):
        with live.paused():     # the prompt must be seen, not drawn over by the panel
            ask(f"Hold the probe at {point.label!r}, {height_m:.2f} m, then press Enter", default="")

    with Store(db_path) as store:
        with Survey(store, port, plan, mover=mover, ready=ready, **link_options) as sv:
            n = 1
            while (p := ask_point(ask, n, console)) is not None:
                try:
                    with LiveReadout(console) as live:
                        sv.capture.on_view = live.update
                        res = sv.measure(p)
                except EOFError:    # Ctrl-D at "hold the probe": end here, the points measured are kept
                    break
                live.point_done(res)
                n += 1
            if console is not None:
                console.print(f"survey closed after {len(sv.results)} point(s)")
            return int(sv.session_id)

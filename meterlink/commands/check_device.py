"""``meterlink check-device``: exercise a connected meter against the wire protocol and show the evidence.

Exit codes: 0 every item passed (or could not be observed) and the meter was left as found, 1 at
least one item failed or a setting could not be put back, 2 usage error or a port that cannot be
opened. The meter's settings and streaming state are restored at the end, also on an interrupt. With the default 12 s of device streaming a real meter
at 1x takes about 15 s; the simulated meter at --speed 100 takes well under a second.
"""

from __future__ import annotations

HELP = "check a connected meter against the wire protocol, item by item, with evidence"

_MARK = {"pass": ("ok", "green"), "fail": ("FAIL", "bold red"), "skip": ("n/a", "yellow")}


def add_arguments(parser) -> None:
    parser.add_argument("--port", metavar="PORT", required=True,
                        help="serial device or pyserial URL (socket://, rfc2217://, spy://)")
    parser.add_argument("--duration", metavar="S", default="12",
                        help="seconds of DEVICE time to stream readings (at least 12, default 12)")
    parser.add_argument("--interval-ms", metavar="N", default="200",
                        help="reading interval to test, clamped to the device's range (default 200)")
    parser.add_argument("--wait-boot", metavar="S", default="0",
                        help="first listen S s for a BOOT frame (reset the meter meanwhile); "
                             "fails the BOOT item if none arrives (default 0: BOOT checked only if seen)")
    parser.add_argument("--seed", metavar="N", default="0", help="seed of the random PING and garbage bytes")
    parser.add_argument("--json", action="store_true", help="print the results as JSON")


def _number(text: str, what: str, integer: bool = False, minimum: float = 0.0) -> float:
    import math

    from meterlink.errors import MeterlinkError

    try:
        v = int(text) if integer else float(text)
    except (TypeError, ValueError):
        raise MeterlinkError(f"{what} {text!r} is not a {'whole ' if integer else ''}number") from None
    if not math.isfinite(v) or v < minimum:
        raise MeterlinkError(f"{what} {text!r} must be at least {minimum:g}")
    return v


def render(report, console) -> None:
    """Print a report as a table (device strings escaped)."""
    from rich.markup import escape
    from rich.table import Table

    from meterlink.cli import SAFETY_LINE
    from meterlink.device.link import safe_text

    i = report.ident
    who = (f"{safe_text(i['model'])} s/n {safe_text(i['serial'])}, firmware {i['fw_major']}.{i['fw_minor']}."
           f"{i['fw_patch']}" if i else "no identification")
    t = Table(title=f"protocol conformance of {escape(who)}", title_justify="left", show_lines=False,
              caption=f"port {escape(report.port)}, {report.elapsed_s:.1f} s", caption_justify="left")
    t.add_column("item", no_wrap=True)
    t.add_column("result", no_wrap=True)
    t.add_column("evidence")
    for r in report.results:
        mark, style = _MARK[r.status]
        t.add_row(escape(r.title), f"[{style}]{mark}[/]", escape(safe_text(r.evidence)))
    console.print(t)
    n_fail = len(report.failed)
    console.print("[green]all items conform[/]" if report.passed else f"[bold red]{n_fail} item(s) do not conform[/]")
    if report.restore is not None:
        style = "green" if report.restored else "bold red"
        console.print(f"[{style}]meter settings {escape(safe_text(report.restore.evidence))}[/]")
    console.print(f"[dim]{SAFETY_LINE}[/]")


def run(args) -> int:

    from meterlink.reports import digits

    from rich.console import Console

    from meterlink.device.conformance import MIN_DURATION_S, run_checks
    from meterlink.device.transport import open_link

    duration = _number(args.duration, "--duration", minimum=MIN_DURATION_S)
    interval = int(_number(args.interval_ms, "--interval-ms", integer=True, minimum=1))
    wait_boot = _number(args.wait_boot, "--wait-boot")
    seed = int(_number(args.seed, "--seed", integer=True))
    link = open_link(args.port)
    try:
        report = run_checks(link, duration_s=duration, interval_ms=interval, wait_boot_s=wait_boot, seed=seed)
    finally:
        link.close()
    if args.json:
        print(digits.dumps(report.to_dict(), indent=2))
    else:
        render(report, Console())
    return 0 if report.passed and report.restored else 1

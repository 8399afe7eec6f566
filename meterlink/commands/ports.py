"""``meterlink ports``: the serial ports pyserial can see."""

from __future__ import annotations

HELP = "list the serial ports on this machine"


def add_arguments(parser) -> None:
    parser.add_argument("--json", action="store_true", help="print machine-readable JSON")


def run(args) -> int:
    import json

    from meterlink.device.transport import list_ports

    ports = list_ports()
    if args.json:
        print(json.dumps([p.__dict__ for p in ports], indent=2))
        return 0
    if not ports:
        print("no serial ports found (a URL such as socket://HOST:PORT also works with --port)")
        return 0
    from rich.console import Console
    from rich.markup import escape
    from rich.table import Table

    t = Table("port", "description", "hardware id")
    for p in ports:
        t.add_row(escape(p.device), escape(p.description), escape(p.hwid))
    Console().print(t)
    return 0

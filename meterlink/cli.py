"""The ``meterlink`` command line: a thin shell over the library.

Each sub-command lives in ``meterlink/commands/<name>.py`` and provides ``HELP`` (one line),
``add_arguments(parser)`` and ``run(args) -> int``. Command modules keep heavy imports
(numpy, scipy, sqlite, rich) inside ``run`` so that ``meterlink --help`` starts fast.
A :class:`~meterlink.errors.MeterlinkError` becomes a one-line message and exit code 2.
"""

from __future__ import annotations

import argparse
import importlib
import pkgutil
import sys

from meterlink import __version__
from meterlink.errors import MeterlinkError

SAFETY_LINE = (
    "Results support, and do not replace, an assessment by a qualified person under local "
    "regulations. Reference levels assume far-field conditions. Stay clear of energised antennas."
)


def _command_modules():
    """Yield (name, module) for every module in meterlink.commands, sorted by name."""
    import meterlink.commands as pkg

    for info in sorted(pkgutil.iter_modules(pkg.__path__), key=lambda i: i.name):
        if info.name.startswith("_"):
            continue
        yield info.name.replace("_", "-"), importlib.import_module(f"meterlink.commands.{info.name}")


def build_parser() -> argparse.ArgumentParser:
    """Build the argument parser with one sub-parser per command module."""
    parser = argparse.ArgumentParser(
        prog="meterlink",
        description="Host companion for an RF field-strength meter. " + SAFETY_LINE,
    )
    parser.add_argument("--version", action="version", version=f"meterlink {__version__}")
    sub = parser.add_subparsers(dest="command", metavar="COMMAND")
    for name, module in _command_modules():
        p = sub.add_parser(name, help=module.HELP, description=module.HELP)
        module.add_arguments(p)
        p.set_defaults(_run=module.run)
    return parser




def main(argv: list[str] | None = None) -> int:
    """Entry point: parse, dispatch, and turn known errors into one line on stderr."""
    parser = build_parser()
    args = parser.parse_args(argv)
    if not getattr(args, "_run", None):
        parser.print_help()
        return 1
    try:
        return int(args._run(args) or 0)
    except MeterlinkError as exc:
        print(f"meterlink {args.command}: error: {exc}", file=sys.stderr)
        return exc.exit_code
    except KeyboardInterrupt:
        print(f"meterlink {args.command}: interrupted", file=sys.stderr)
        return 130
    except (OSError, ValueError) as exc:
        # Last line of defence: a one-line message rather than a traceback.
        print(f"meterlink {args.command}: error: {exc}", file=sys.stderr)
        return 2


if __name__ == "__main__":  # pragma: no cover
    raise SystemExit(main())

"""The ``meterlink`` command line: a thin shell over the library.

Each sub-command lives in ``meterlink/commands/<name>.py`` and provides ``HELP`` (one line),
``add_arguments(parser)`` and ``run(args) -> int``. Command modules keep heavy imports
(numpy, scipy, sqlite, rich) inside ``run`` so that ``meterlink --help`` starts fast.
A :class:`~meterlink.errors.MeterlinkError` becomes a one-line message and exit code 2.
"""

from __future__ import annotations

import argparse
import importlib
import os
import re
import signal
import sys

from meterlink import __version__
from meterlink.cautions import SAFETY_LINE
from meterlink.errors import MeterlinkError


def _command_names() -> list[str]:
    """Module names in meterlink.commands (found on disk, nothing imported), sorted. A listing of the
    package's folder: pkgutil.iter_modules would do the same at the price of its imports."""
    import meterlink.commands as pkg

    return sorted({entry.name[:-3] for folder in pkg.__path__ for entry in os.scandir(folder)
                   if entry.name.endswith(".py") and not entry.name.startswith("_")})


def _command_modules(only: str | None = None):
    """Yield (name, module) for every module in meterlink.commands, sorted by name (or just ``only``)."""
    for name in _command_names():
        if only is None or name == only:
            yield name.replace("_", "-"), importlib.import_module(f"meterlink.commands.{name}")


def build_parser(command: str | None = None) -> argparse.ArgumentParser:
    """Build the argument parser with one sub-parser per command module; given the name of an existing
    command, with that one only (start-up: the other command modules are not imported)."""
    only = command.replace("-", "_") if command and command.replace("-", "_") in _command_names() else None
    parser = argparse.ArgumentParser(
        prog="meterlink",
        description="Host companion for an RF field-strength meter. " + SAFETY_LINE,
    )
    parser.add_argument("--version", action="version", version=f"meterlink {__version__}")
    sub = parser.add_subparsers(dest="command", metavar="COMMAND")
    for name, module in _command_modules(only):
        p = sub.add_parser(name, help=module.HELP, description=module.HELP)
        module.add_arguments(p)
        p.set_defaults(_run=module.run)
    return parser




def main(argv: list[str] | None = None) -> int:
    """Entry point: parse, dispatch, and turn known errors into one line on stderr."""
    argv = _protect_negative_positionals(sys.argv[1:] if argv is None else argv)
    parser = build_parser(argv[0] if argv and not argv[0].startswith("-") else None)
    args = parser.parse_args(argv)
    if not getattr(args, "_run", None):
        parser.print_help()
        return 1
    try:
        code = int(args._run(args) or 0)
        sys.stdout.flush()           # a reader that went away shows here, inside the handler below
        return code
    except BrokenPipeError:
        return _broken_pipe()
    except SystemExit as exc:
        if isinstance(exc.__context__, BrokenPipeError):   # rich's own handling of a closed stdout
            return _broken_pipe()
        raise
    except MeterlinkError as exc:
        print(f"meterlink {args.command}: error: {exc}", file=sys.stderr)
        return exc.exit_code
    except KeyboardInterrupt:
        print(f"meterlink {args.command}: interrupted", file=sys.stderr)
        return 130
    except Exception as exc:
        sqlite3 = sys.modules.get("sqlite3")    # imported only by commands that use it: start-up stays light
        if sqlite3 is None or not isinstance(exc, sqlite3.DatabaseError):
            if isinstance(exc, (OSError, ValueError)):
                # Last line of defence: a one-line message rather than a traceback.
                print(f"meterlink {args.command}: error: {exc}", file=sys.stderr)
                return 2
            raise
        # a damaged page met in the middle of a command: name the file and say what to do
        from meterlink.storage.store import describe_sqlite_error

        db = getattr(args, "db", None) or "the database"
        print(f"meterlink {args.command}: error: {describe_sqlite_error(db, exc)}", file=sys.stderr)
        return 2


def _broken_pipe() -> int:
    """The reader of our output went away (``| head``): stop quietly, as a program killed by SIGPIPE.

    Python ignores SIGPIPE, so a write fails with EPIPE instead; the usual convention is a quiet
    exit with status 128 + SIGPIPE. stdout is pointed at /dev/null so that the interpreter's own
    flush at exit does not complain a second time.
    """
    try:
        devnull = os.open(os.devnull, os.O_WRONLY)
        os.dup2(devnull, sys.stdout.fileno())
    except (OSError, ValueError):   # stdout without a file descriptor (captured): nothing to redirect
        pass
    return 128 + signal.SIGPIPE


def _protect_negative_positionals(argv: list[str]) -> list[str]:
    """Let a negative-looking value such as ``limits -5MHz`` reach its command, which explains the
    problem, instead of argparse taking it for an unknown option: the command's one positional
    value is moved to the end, after ``--``, so options before and after it still work."""
    out = list(argv)
    if out and out[0] == "limits":
        for i, a in enumerate(out[1:], 1):
            if a == "--":
                break
            if _NEGATIVE.match(a) and (i == 1 or not out[i - 1].startswith("--")):
                return out[:i] + out[i + 1:] + ["--", a]
    return out


_NEGATIVE = re.compile(r"^-[0-9.]")


if __name__ == "__main__":  # pragma: no cover
    raise SystemExit(main())

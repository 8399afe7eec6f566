"""Every ``meterlink ...`` command line shown in README.md and docs/*.md parses as written.

A reader types what the documentation shows. Each command line of a fenced or indented code block
is split as a POSIX shell would (quotes, ``# comments``, ``\\`` continuations, a trailing ``&``) and
given to the real argument parser of the CLI: a missing required option, a renamed option or an
unknown sub-command fails here with the file and line. Synopsis lines (``[--json]``, ``...``,
``csv|json``) are not commands and are left out. Running the commands is the walk-through's job
(tests of each command run them on real files); this keeps the text and the options in step.
"""

from __future__ import annotations

import re
import shlex
from pathlib import Path

import pytest

from meterlink.cli import build_parser

ROOT = Path(__file__).resolve().parent.parent
DOCS = [ROOT / "README.md", *sorted((ROOT / "docs").glob("*.md"))]


def _code_lines(path: Path):
    """(line number, text) of the lines inside fenced (```) or indented (4 spaces) code blocks,
    with backslash continuations joined."""
    fenced = False
    pending, start = "", 0
    for no, line in enumerate(path.read_text(encoding="utf-8").splitlines(), 1):
        if line.lstrip().startswith("```"):
            fenced = not fenced
            continue
        if not (fenced or line.startswith("    ")):
            continue
        text = line.strip()
        if pending:
            text, no = pending + " " + text, start
        if text.endswith("\\"):
            pending, start = text[:-1].rstrip(), no
            continue
        pending = ""
        yield no, text


def _commands():
    found = []
    for path in DOCS:
        for no, text in _code_lines(path):
            m = re.match(r"^(?:\S*/)?meterlink (?=\S)", text)
            if not m or text.startswith("meterlink monitor: error"):    # a message, not a command
                continue
            try:
                argv = shlex.split(text[m.end():], comments=True)
            except ValueError as exc:
                found.append((f"{path.name}:{no}", text, f"not a shell line: {exc}"))
                continue
            if argv and argv[-1] == "&":
                argv = argv[:-1]
            if any(a.startswith("[") or a == "..." or a.endswith("]...") or "|" in a for a in argv):
                continue                      # a synopsis (optional parts, alternatives), not a command
            found.append((f"{path.name}:{no}", text, argv))
    return found


COMMANDS = _commands()


def test_the_docs_show_commands_of_every_kind():
    """The extraction finds the documented commands (a change of the code-block style would
    otherwise leave this test checking nothing)."""
    names = {argv[0] for _, _, argv in COMMANDS if isinstance(argv, list)}
    assert {"survey", "report", "record", "sessions", "assess", "limits", "predict", "monitor",
            "status", "stats", "export", "central", "lab", "render", "selective", "simulate",
            "scpi-sim", "check-device", "device"} <= names, names
    assert len(COMMANDS) >= 50


@pytest.mark.parametrize("where,text,argv", COMMANDS, ids=[c[0] for c in COMMANDS])
def test_documented_command_parses(where, text, argv, capsys):
    assert isinstance(argv, list), f"{where}: {argv}"
    try:
        build_parser(argv[0]).parse_args(argv)
    except SystemExit as exc:
        err = capsys.readouterr().err.strip().splitlines()
        pytest.fail(f"{where}: `meterlink {' '.join(argv)}` does not parse (exit {exc.code}): "
                    f"{err[-1] if err else ''}")


def test_every_command_and_action_says_what_it_does_and_every_option_has_help():
    """`meterlink X --help` and `meterlink X ACTION --help` open with a line of what it does, and no
    option is listed bare (the practitioner's only reference at the terminal)."""
    import argparse

    missing = []

    def walk(parser, path):
        if not parser.description:
            missing.append(f"{path}: no description")
        for action in parser._actions:
            if isinstance(action, argparse._SubParsersAction):
                for name, sub in action.choices.items():
                    walk(sub, f"{path} {name}")
            elif not isinstance(action, argparse._HelpAction) and not action.help:
                missing.append(f"{path} {'/'.join(action.option_strings) or action.dest}: no help")

    walk(build_parser(), "meterlink")
    assert not missing, missing


def test_documented_lab_runs_write_new_folders():
    """Typed in order, each documented `lab run` / `lab import` of a file writes its own --out folder:
    an issued certificate is never overwritten, so a second run into the same folder stops (exit 2)."""
    clashes = []
    for path in DOCS:
        seen = {}
        for where, _text, argv in COMMANDS:
            if not where.startswith(path.name + ":") or argv[:2] not in (["lab", "run"], ["lab", "import"]):
                continue
            args = build_parser("lab").parse_args(argv)
            out = args.out.rstrip("/")
            if out in seen:
                clashes.append(f"{where} writes {out}/ as {seen[out]} did")
            seen[out] = where
    assert not clashes, clashes

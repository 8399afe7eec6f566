"""The survey at a real terminal: meterlink runs on a pseudo-terminal as a technician would run it,
against the simulated meter on its own pty. Prompts must be seen, and Ctrl-D (end of input) at any
prompt ends the survey cleanly with what was measured kept.
"""

from __future__ import annotations

import os
import re
import select
import subprocess
import sys
import time

import pytest

from meterlink.storage.store import Store
from meterlink.survey.store import load_survey
from meterlink.simulators.pty_meter import SimulatedMeter

ANSI = re.compile(r"\x1b\[[0-9;?]*[ -/]*[@-~]|\x1b[()][0-9A-B]|\r")
CTRL_D = b"\x04"


class Terminal:
    """meterlink on the slave side of a pty; the test types on the master side and reads the screen."""

    def __init__(self, *argv):
        self.master, slave = os.openpty()
        env = dict(os.environ, TERM="xterm-256color", COLUMNS="110", LINES="40")
        env.pop("NO_COLOR", None)
        self.proc = subprocess.Popen([sys.executable, "-m", "meterlink", *map(str, argv)], stdin=slave,
                                     stdout=slave, stderr=slave, env=env, start_new_session=True)
        os.close(slave)
        self.text = ""          # everything shown so far, ANSI codes removed
        self.pos = 0            # how far expect() has consumed

    def _read(self, timeout_s: float) -> bool:
        r, _, _ = select.select([self.master], [], [], timeout_s)
        if not r:
            return False
        try:
            data = os.read(self.master, 65536)
        except OSError:         # EIO: the program ended and closed the terminal
            return False
        self.text += ANSI.sub("", data.decode("utf-8", "replace"))
        return bool(data)

    def expect(self, pattern: str, timeout_s: float = 30.0) -> str:
        """Wait (monotonic deadline) until pattern shows after the last match; returns the text up to it."""
        deadline = time.monotonic() + timeout_s
        while True:
            i = self.text.find(pattern, self.pos)
            if i >= 0:
                seen, self.pos = self.text[self.pos:i + len(pattern)], i + len(pattern)
                return seen
            left = deadline - time.monotonic()
            if left <= 0 or (not self._read(min(left, 0.2)) and self.proc.poll() is not None):
                raise AssertionError(f"{pattern!r} not shown; the screen ends with:\n{self.text[-1500:]}")

    def shown_within(self, seconds: float) -> str:
        """What the program draws in the next `seconds` (nothing is typed meanwhile)."""
        start, deadline = len(self.text), time.monotonic() + seconds
        while time.monotonic() < deadline:
            self._read(max(0.0, deadline - time.monotonic()))
        return self.text[start:]

    def send(self, data: bytes) -> None:
        os.write(self.master, data)

    def finish(self, timeout_s: float = 60.0) -> int:
        deadline = time.monotonic() + timeout_s
        while self.proc.poll() is None and time.monotonic() < deadline:
            self._read(0.2)
        while self._read(0.05):
            pass
        if self.proc.poll() is None:
            self.proc.kill()
            self.proc.wait()
            raise AssertionError(f"still running; screen ends with:\n{self.text[-1500:]}")
        os.close(self.master)
        return self.proc.returncode


PLAN = """[survey]
standard = "icnirp-2020"
tier = "public"
rule = "guarded"
certificate = "demo-probe"
settle_s = 1
spot_s = 3
[site]
name = "Harrow Common (invented)"
[[point]]
label = "gate"
[[point]]
label = "bench"
"""


@pytest.fixture
def meter():
    with SimulatedMeter("demo", sensor="probe", seed=2, speed=20.0) as sim:
        yield sim


def test_scripted_survey_prompt_is_seen_and_ctrl_d_ends_it_keeping_the_first_point(tmp_path, meter):
    plan = tmp_path / "plan.toml"
    plan.write_text(PLAN, encoding="utf-8")
    db = tmp_path / "s.db"
    term = Terminal("survey", "--port", meter.port, "--db", db, "--plan", plan)
    term.expect("Hold the probe at 'gate'")
    term.expect("press Enter")
    # while the technician reads the prompt, no live panel is drawn over it
    drawn = term.shown_within(1.0)
    assert "survey readout" not in drawn and "waiting for the meter" not in drawn, drawn
    term.send(b"\r")
    term.expect("gate  ")                          # the point's result line
    term.expect("Hold the probe at 'bench'")
    term.send(CTRL_D)
    term.expect("input ended: survey closed after 1 point(s)")
    code = term.finish()
    assert code == 0 and "Traceback" not in term.text, term.text[-2000:]
    with Store(db, readonly=True) as store:
        sv = load_survey(store, 1)
    assert [p["label"] for p in sv["points"]] == ["gate"]


def test_interactive_survey_ctrl_d_at_the_next_label_keeps_the_point_measured(tmp_path, meter):
    db = tmp_path / "i.db"
    term = Terminal("survey", "--port", meter.port, "--db", db)
    for prompt, answer in (("Site name", b"Harrow Common\r"), ("Technician", b"\r"), ("Standard", b"\r"),
                           ("Tier", b"\r"), ("Decision rule", b"\r"), ("Certificate", b"\r"), ("Follow-up", b"\r"),
                           ("Declared frequency", b"\r"), ("Source 1 name", b"\r"), ("Weather", b"\r"),
                           ("air temperature", b"\r"), ("relative humidity", b"\r"),
                           ("Transmitter state confirmed with", b"\r"), ("Sources file", b"\r"),
                           ("Report number", b"\r"), ("Point 1 label", b"stile\r"), ("Mode", b"\r"), ("Height", b"\r"),
                           ("Position", b"\r"), ("Duration", b"3\r"), ("Notes", b"\r"), ("Photo of", b"\r")):
        term.expect(prompt)
        term.send(answer)
    term.expect("Hold the probe at 'stile'")
    assert "survey readout" not in term.shown_within(0.5)
    term.send(b"\r")
    term.expect("Measure a point again")
    term.send(b"\r")
    term.expect("Point 2 label")
    term.send(CTRL_D)
    term.expect("survey closed after 1 point(s)")
    code = term.finish()
    assert code == 0 and "Traceback" not in term.text, term.text[-2000:]
    with Store(db, readonly=True) as store:
        assert [p["label"] for p in load_survey(store, 1)["points"]] == ["stile"]


@pytest.mark.parametrize("at", ["Site name", "Tier"])
def test_interactive_ctrl_d_before_the_choices_are_made_records_nothing(tmp_path, meter, at):
    db = tmp_path / "none.db"
    term = Terminal("survey", "--port", meter.port, "--db", db)
    for prompt, answer in (("Site name", b"Harrow Common\r"), ("Technician", b"\r"), ("Standard", b"\r"),
                           ("Tier", b"\r")):
        term.expect(prompt)
        if prompt == at:
            term.send(CTRL_D)
            break
        term.send(answer)
    code = term.finish()
    assert code == 2 and "Traceback" not in term.text
    assert "input ended before the survey's choices were complete" in term.text
    assert not db.exists()


def test_interactive_ctrl_d_at_the_hold_prompt_ends_cleanly(tmp_path, meter):
    db = tmp_path / "h.db"
    term = Terminal("survey", "--port", meter.port, "--db", db)
    for prompt, answer in (("Site name", b"Harrow Common\r"), ("Technician", b"\r"), ("Standard", b"\r"),
                           ("Tier", b"\r"), ("Decision rule", b"\r"), ("Certificate", b"\r"), ("Follow-up", b"\r"),
                           ("Declared frequency", b"\r"), ("Source 1 name", b"\r"), ("Weather", b"\r"),
                           ("air temperature", b"\r"), ("relative humidity", b"\r"),
                           ("Transmitter state confirmed with", b"\r"), ("Sources file", b"\r"),
                           ("Report number", b"\r"), ("Point 1 label", b"stile\r"), ("Mode", b"\r"), ("Height", b"\r"),
                           ("Position", b"\r"), ("Duration", b"3\r"), ("Notes", b"\r"), ("Photo of", b"\r")):
        term.expect(prompt)
        term.send(answer)
    term.expect("Hold the probe at 'stile'")
    term.send(CTRL_D)
    term.expect("survey closed after 0 point(s)")
    code = term.finish()
    assert code == 0 and "Traceback" not in term.text
    with Store(db, readonly=True) as store:
        assert load_survey(store, 1)["points"] == []

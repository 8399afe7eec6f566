"""Shared test helpers: waiting on a condition with a monotonic deadline, and leak checks."""

import os
import signal
import threading
import time
from pathlib import Path

import pytest

ROOT = Path(__file__).resolve().parent.parent

# pytest-xdist's workers ignore SIGINT, and an ignored signal stays ignored across exec: the meterlink
# processes the tests start would never see the Ctrl-C some tests send. A handler is reset to the default
# on exec, so the children get SIGINT as from a terminal.
if signal.getsignal(signal.SIGINT) is signal.SIG_IGN:
    signal.signal(signal.SIGINT, signal.default_int_handler)


def wait_until(predicate, timeout_s: float = 5.0, poll_s: float = 0.01) -> bool:
    """True as soon as predicate() holds; False once timeout_s (monotonic) has passed."""
    deadline = time.monotonic() + timeout_s
    while True:
        if predicate():
            return True
        if time.monotonic() >= deadline:
            return False
        time.sleep(poll_s)


@pytest.fixture(autouse=True)
def no_leaked_link_threads():
    """Fail a test that leaves a meterlink reader or writer thread running."""
    yield
    alive = lambda: [t.name for t in threading.enumerate() if t.name.startswith("meterlink-")]  # noqa: E731
    if not wait_until(lambda: not alive(), 5.0):
        pytest.fail(f"leaked threads: {alive()}")


@pytest.hookimpl(hookwrapper=True)
def pytest_runtest_makereport(item, call):
    """Under CI (CI set in the environment) a skipped test is a failure: CI must provide what every
    test needs (compiler, systemd-analyze, SQLite features), never quietly run fewer checks."""
    outcome = yield
    report = outcome.get_result()
    if report.skipped and os.environ.get("CI") and not hasattr(report, "wasxfail"):
        report.outcome = "failed"
        report.longrepr = f"skipped under CI, which must provide what this test needs: {report.longrepr}"

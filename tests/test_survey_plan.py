"""Survey plan files: the example loads; bad plans give one line naming the file and the problem."""

import subprocess
import sys

import pytest

from conftest import ROOT
from meterlink.survey.plan import PlanError, load_plan

GOOD = """
[survey]
standard = "icnirp-2020"
tier = "public"
rule = "guarded"
certificate = "demo-probe"
[site]
name = "Example site"
[[point]]
label = "A"
mode = "spot"
"""


def test_example_plan_loads():
    plan = load_plan(ROOT / "simulators" / "scenarios" / "demo-survey.toml")
    assert plan.site.name and plan.standard == "icnirp-1998" and plan.rule == "guarded"
    modes = {p.mode for p in plan.points}
    assert {"spot", "sweep", "spatial", "average"} <= modes
    line = next(p for p in plan.points if p.scheme and p.scheme.name.startswith("vertical-line"))
    assert line.scheme.heights_m == pytest.approx((0.2, 0.6, 1.0, 1.4, 1.8))
    assert all(s.max_power_w >= s.power_w for s in plan.sources)


@pytest.mark.parametrize("change, problem", [
    (lambda t: t + "\n[[point]\n", "not valid TOML"),
    (lambda t: t.replace('mode = "spot"', 'mode = "hover"'), "mode 'hover' is not one of"),
    (lambda t: t.replace('"icnirp-2020"', '"icnirp-2099"'), "icnirp-2099"),
    (lambda t: t.replace('"guarded"', '"lenient"'), "unknown decision rule"),
    (lambda t: t.replace('label = "A"', 'labl = "A"'), "unknown key 'labl'"),
    (lambda t: t + '[[point]]\nlabel = "A"\n', "label 'A' is used twice"),
    (lambda t: t.replace('mode = "spot"', 'mode = "spatial"\nscheme = "custom"'), "custom scheme needs heights_m"),
    (lambda t: t.replace('mode = "spot"', 'mode = "spot"\nheight_m = 40'), "height_m = 40"),
    (lambda t: t.replace('mode = "spot"', 'mode = "spot"\nx_m = 3'), "both x_m and y_m"),
    (lambda t: t + '[[source]]\nname = "S"\nfreq_hz = 1e8\npower_w = 10\nmax_power_w = 5\n', "below power_w"),
    (lambda t: t.replace('name = "Example site"', ''), "missing 'name'"),
])
def test_bad_plans_name_the_file_and_the_problem(tmp_path, change, problem):
    p = tmp_path / "bad-plan.toml"
    p.write_text(change(GOOD))
    with pytest.raises(PlanError) as info:
        load_plan(p)
    msg = str(info.value)
    assert "\n" not in msg and str(p) in msg and problem in msg, msg


def test_cli_bad_plan_is_one_line_exit_2(tmp_path):
    p = tmp_path / "plan.toml"
    p.write_text(GOOD.replace('mode = "spot"', 'mode = "hover"'))
    out = subprocess.run([sys.executable, "-m", "meterlink", "survey", "--port", "/dev/null-nothing", "--plan",
                          str(p), "--db", str(tmp_path / "s.db")], capture_output=True, text=True, cwd=ROOT,
                         timeout=60)
    assert out.returncode == 2
    lines = out.stderr.strip().splitlines()
    assert len(lines) == 1 and str(p) in lines[0] and "hover" in lines[0] and "Traceback" not in out.stderr
    missing = subprocess.run([sys.executable, "-m", "meterlink", "survey", "--port", "x", "--plan",
                              str(tmp_path / "nope.toml")], capture_output=True, text=True, cwd=ROOT, timeout=60)
    assert missing.returncode == 2 and "nope.toml" in missing.stderr and len(missing.stderr.strip().splitlines()) == 1

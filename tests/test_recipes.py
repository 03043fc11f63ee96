"""Every command in recipes/README.md runs, and shows what the README says it shows.

The commands are read from the README itself, so a recipe cannot drift from its test. To stay
fast they run with ``--effort quick`` and, for ``check``, ``--only`` the check the recipe is
about (the checks named here exist today; later checks do not change these verdicts). The
lossguard commands run in-process; the pytest recipe runs once in a subprocess under xdist.
"""

from __future__ import annotations

import json
import re
import shlex
from pathlib import Path

import hypothesis  # noqa: F401  (imported once here, not inside the in-process runs)
import pytest

from lossguard.cli import main

pytest_plugins = ["pytester"]

ROOT = Path(__file__).resolve().parent.parent
README = ROOT / "recipes" / "README.md"

#: the function of the last FILE.py:FUNCTION in a README ``check`` command → (the check the
#: recipe is about, its verdict)
CHECKS = {
    "poly1_grade": ("gradient", "pass"),
    "poly1_grade_draft": ("finite", "fail"),
    "smoothed_bruise": ("reference", "pass"),
    "smoothed_bruise_off_by_one": ("reference", "fail"),
    "stem_loss_grad": ("reference", "pass"),
    "stem_loss_grad_unscaled": ("reference", "fail"),
    "gap_ce": ("reference", "pass"),
    "gap_ce_all_frames": ("reference", "fail"),
    "focal_v2": ("reference", "pass"),
}


def _commands(program: str) -> list[str]:
    return re.findall(rf"^\$ {program} (.+)$", README.read_text(encoding="utf-8"), flags=re.M)


def _about(command: str) -> tuple[str, str]:
    function = re.findall(r"\.py:(\w+)", command)[-1]
    assert function in CHECKS, f"no expectation for README command: {command}"
    return CHECKS[function]


def test_every_readme_command_has_an_expectation() -> None:
    checks = [c for c in _commands("lossguard") if c.startswith("check ")]
    assert len(checks) == len(CHECKS)
    assert sorted(_about(c) for c in checks) == sorted(CHECKS.values())
    assert len(_commands("lossguard")) == len(checks) + 1  # and one compare
    assert len(_commands("pytest")) == 3


@pytest.mark.parametrize("command", [c for c in _commands("lossguard") if c.startswith("check ")])
def test_check_recipe(command: str, tmp_path: Path, monkeypatch: pytest.MonkeyPatch,
                      capsys: pytest.CaptureFixture[str]) -> None:
    monkeypatch.chdir(ROOT)  # the README's paths are relative to the repository root
    check, verdict = _about(command)
    report = tmp_path / "report.json"
    code = main(shlex.split(command) + ["--effort", "quick", "--only", check, "--json", str(report)])
    out = capsys.readouterr().out
    doc = json.loads(report.read_text())
    assert [(c["name"], c["verdict"]) for c in doc["checks"]] == [(check, verdict)], out
    assert code == (0 if verdict == "pass" else 1)
    if verdict == "fail":
        assert "replay: loss(" in out or "worst case" in out


def test_compare_recipe(tmp_path: Path, monkeypatch: pytest.MonkeyPatch, capsys: pytest.CaptureFixture[str]) -> None:
    monkeypatch.chdir(ROOT)
    (command,) = [c for c in _commands("lossguard") if c.startswith("compare ")]
    report = tmp_path / "compare.json"
    code = main(shlex.split(command) + ["--effort", "quick", "--json", str(report)])
    out = capsys.readouterr().out
    assert code == 1, out
    doc = json.loads(report.read_text())
    assert {p["name"]: p["verdict"] for p in doc["parts"]} == {
        "value float64": "pass", "gradient float64": "fail", "value float32": "pass", "gradient float32": "fail"}
    smallest = doc["smallest"]
    assert len(smallest["predictions"]) == 1 and "nan" in json.dumps(smallest["expected"])
    assert "smallest input that shows it: gradient in" in out


def test_pytest_recipe_under_xdist(pytester: pytest.Pytester) -> None:
    commands = _commands("pytest")
    assert any("-n auto" in c for c in commands)
    (selective,) = [c for c in commands if "-k" in c and "sorting_line" in c]
    args = [str(ROOT / a) if a.endswith(".py") else a for a in shlex.split(selective)]
    # -n 2 stands in for -n auto: the same distribution, without claiming every core
    quiet = ["-p", "no:cacheprovider", "-p", "no:benchmark", "-p", "no:hypothesispytest"]
    result = pytester.runpytest_subprocess(*args, "-n", "2", *quiet, f"--rootdir={ROOT}", "-q")
    outcomes = result.parseoutcomes()
    assert result.ret == 0, result.stdout.str()
    # four declarations name a reference; the grade loss has none, so its item is a skip
    assert outcomes.get("passed") == 5 and outcomes.get("skipped") == 1, outcomes


def test_torch_recipe(pytester: pytest.Pytester) -> None:
    pytest.importorskip("torch")
    (command,) = [c for c in _commands("pytest") if "torch" in c]
    args = [str(ROOT / a) if a.endswith(".py") else a for a in shlex.split(command)]
    quiet = ["-p", "no:cacheprovider", "-p", "no:benchmark", "-p", "no:hypothesispytest"]
    result = pytester.runpytest_subprocess(*args, *quiet, f"--rootdir={ROOT}", "-q")
    outcomes = result.parseoutcomes()
    assert result.ret == 0, result.stdout.str()
    # ripeness: the default battery, 14 checks (second-order and proper are opt-in skips); blemish
    # three checks, stems two, and the pinned slip
    assert outcomes.get("passed") == 19 and outcomes.get("skipped") == 2, outcomes

"""The command contract: exit codes 0 / 1 / 2 and what the terminal shows."""

from __future__ import annotations

import json
import subprocess
import sys

import pytest

from lossguard.cli import main

EXAMPLE = "lossguard/examples/reef_survey.py"


def run_cli(capsys, *argv):
    code = main(list(argv))
    out, err = capsys.readouterr()
    return code, out, err


def test_correct_ce_exits_zero(capsys):
    code, out, _ = run_cli(capsys, "check", f"{EXAMPLE}:tile_loss", "--kind", "categorical",
                           "--reference", "categorical_ce", "--effort", "quick", "--only", "reference",
                           "--only", "finite")
    assert code == 0, out
    assert "reference" in out and "finite" in out


def test_log_of_softmax_exits_one_and_shows_the_logits(capsys):
    code, out, _ = run_cli(capsys, "check", f"{EXAMPLE}:tile_loss_old", "--kind", "categorical",
                           "--reference", "categorical_ce", "--effort", "quick", "--only", "reference")
    assert code == 1
    assert "FAIL" in out and "predictions" in out and "replay:" in out
    # the failing case is an extreme one: a logit of at least 90 appears in what is shown
    assert any(tok in out for tok in ("90.", "100.", "1000.", "10000."))


@pytest.mark.parametrize(
    "argv, fragment",
    [
        (["check", "missing_file.py:f", "--kind", "categorical"], "expected an existing .py file"),
        (["check", "os.path:basename", "--kind", "categorical"], "check its signature"),
        (["check", "os.path:join", "--kind", "categorical"], "raised TypeError"),
        (["check", f"{EXAMPLE}:tile_loss", "--kind", "categorical", "--skip", "finit"], "try 'finite'"),
        (["check", f"{EXAMPLE}:tile_loss", "--kind", "categorical", "--param", "=3"], "KEY=VALUE"),
        (["check", f"{EXAMPLE}:tile_loss", "--kind", "binary"], "loss="),
    ],
)
def test_unusable_input_exits_two_with_one_line(capsys, argv, fragment):
    code, out, err = run_cli(capsys, *argv)
    assert code == 2
    assert fragment in err
    assert err.count("\n") == 1 and "Traceback" not in err


def test_json_report_is_deterministic(capsys, tmp_path):
    paths = [tmp_path / "a.json", tmp_path / "b.json"]
    for p in paths:
        run_cli(capsys, "check", f"{EXAMPLE}:tile_loss", "--kind", "categorical", "--reference",
                "categorical_ce", "--effort", "quick", "--only", "reference", "--seed", "7", "--json", str(p))
    a, b = (json.loads(p.read_text()) for p in paths)
    for d in (a, b):
        d.pop("seconds")
        for c in d["checks"]:
            c.pop("seconds")
    assert a == b and a["seed"] == 7


def test_references_and_checks_listings(capsys):
    code, out, _ = run_cli(capsys, "references")
    assert code == 0 and "categorical_ce" in out and "Szegedy" in out
    code, out, _ = run_cli(capsys, "checks")
    assert code == 0 and "reference" in out and "finite" in out


def test_installed_command_runs():
    proc = subprocess.run([sys.executable, "-m", "lossguard", "checks"], capture_output=True, text=True)
    assert proc.returncode == 0 and "finite" in proc.stdout


def test_library_hints_are_shown_in_the_command_line_syntax() -> None:
    from lossguard.cli import for_the_command_line
    from lossguard.errors import SpecError
    from lossguard.spec import declare

    with pytest.raises(SpecError) as info:  # the library speaks of params, in Python
        declare(lambda z, y, **p: z.sum(), kind="categorical", params={"not an identifier": 1})
    assert "try passing gamma=" in str(info.value) and "--param" not in str(info.value)
    assert "try --param gamma=" in for_the_command_line(str(info.value))

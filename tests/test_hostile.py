"""Hostile losses and bad input: every kind ends with its exit code, one line, and no traceback.

Each case is one kind of broken use, as a new user would try it. Kinds that are refused (exit 2)
assert one line on stderr naming the problem; kinds that reach the battery assert the verdict of
the check that catches them. The losses are in ``tests/hostile/``. Runs that must be timed or
whose process must survive (sleeping losses, a huge class count) run in a subprocess.
"""

from __future__ import annotations

import io
import json
import os
import resource
import signal
import subprocess
import sys
import time

import numpy as np
import pytest

from lossguard import declare, run
from lossguard._deadline import CallTimeout, deadline
from lossguard._memory import default_budget
from lossguard.cli import main
from lossguard.report import progress

ROOT = os.path.dirname(os.path.dirname(os.path.abspath(__file__)))
H = "tests/hostile/losses.py"
EXAMPLE = "lossguard/examples/reef_survey.py:tile_loss"
QUICK = ["--effort", "quick"]


def cli(capsys, *argv):
    code = main(list(argv))
    out, err = capsys.readouterr()
    assert "Traceback" not in out + err
    return code, out, err


def refused(capsys, fragment, *argv):
    """The command ends with exit 2 and one line on stderr holding ``fragment``."""
    code, out, err = cli(capsys, *argv)
    assert code == 2, (out, err)
    assert err.count("\n") == 1 and err.startswith("lossguard: "), err
    assert fragment in err, err
    return out, err


# -- outputs of the wrong type, and a declared grad of the wrong shape (item 3) ---------------
# Before: None was judged (finite FAIL), a string passed eight checks, complex/int/bool gave ten
# ERR lines each, a dict nine, a tuple "returned shape (2,)" without saying tuple.
@pytest.mark.parametrize("name, fragment", [
    ("returns_none", "returned None; expected a real floating-point array"),
    ("returns_string", "returned a string ('0.5')"),
    ("returns_complex", "returned complex values (complex64)"),
    ("returns_complex_np", "returned a complex number"),
    ("returns_int", "returned the int 0, the same for every input"),
    ("returns_int_array", "returned int32 values, which have no gradient"),
    ("returns_tuple", "returned a tuple of 2 items"),
    ("returns_dict", "returned a dict with keys ['loss']"),
    ("returns_list", "returned a list of 2 items"),
    ("returns_object", "returned a Box object"),
    ("returns_bool", "returned a bool (True)"),
])
def test_an_output_of_the_wrong_type_is_refused_at_the_probe(capsys, name, fragment):
    out, err = refused(capsys, fragment, "check", f"{H}:{name}", "--kind", "categorical", *QUICK)
    assert f"loss={H}:{name}: " in err and "; try " in err
    assert out == ""  # nothing ran


def test_a_grad_of_the_wrong_shape_names_the_expected_shape(capsys):
    # before: "lossguard could not complete this check … please report it with the seed"
    refused(capsys, "returned shape (3,) for predictions of shape (8, 3); expected the predictions' shape (8, 3)",
            "check", f"{H}:good_np", "--grad", f"{H}:good_np_grad_wrong_shape", "--kind", "categorical", *QUICK)


def test_a_per_class_output_is_refused_with_its_shape(capsys):
    refused(capsys, "returned shape (3,) for predictions of shape (8, 3)",
            "check", f"{H}:per_class_vector", "--kind", "categorical", *QUICK)


# -- time (item 1) --------------------------------------------------------------------------
def _timed(*argv, timeout=120):
    t0 = time.monotonic()
    proc = subprocess.run([sys.executable, "-m", "lossguard", *argv], capture_output=True, text=True,
                          cwd=ROOT, env={**os.environ, "PYTHONPATH": ROOT}, timeout=timeout)
    assert "Traceback" not in proc.stdout + proc.stderr
    return proc, time.monotonic() - t0


def test_a_loss_that_sleeps_on_every_call_ends_at_its_call_timeout():
    # before: ran until killed (30 s per call), printing nothing when piped
    proc, seconds = _timed("check", f"{H}:sleeps", "--kind", "categorical", "--call-timeout", "1")
    assert proc.returncode == 2
    assert proc.stderr.count("\n") == 1
    assert "did not return within 1 s (the per-call limit), while probing the loss" in proc.stderr
    assert "shape (8, 3) in float32" in proc.stderr
    assert seconds < 1 + 20  # 1 s of sleep; the rest is starting Python and JAX on a loaded machine


@pytest.mark.parametrize("name", ["hangs_on_ten_classes", "spins_on_ten_classes"])
def test_a_loss_that_hangs_on_one_shape_ends_those_checks_and_reports_every_other(name):
    # a generous battery budget: under a loaded machine the checks that do run may be slow
    proc, seconds = _timed("check", f"{H}:{name}", "--kind", "categorical", "--call-timeout", "1",
                           "--time-budget", "200", timeout=300)
    assert proc.returncode == 1
    lines = proc.stdout.splitlines()
    verdicts = {ln.split()[1]: ln.split()[0] for ln in lines[1:-1] if ln.startswith("  ") and not ln.startswith("    ")}
    assert len(verdicts) == 15  # every check has a verdict line
    assert verdicts["deterministic"] == "ok"  # runs at the (8, 3) shape only
    errors = [ln for ln in lines if ln.startswith("  ERR")]
    assert errors and all("(16, 10)" in ln and "per-call limit" in ln for ln in errors)
    assert any("in check " in ln for ln in errors)
    # one timeout per (shape, dtype): later checks asking for it are answered at once
    assert any("not called again" in ln for ln in errors)
    assert seconds < 200 + 10


def test_the_battery_budget_stops_the_run_and_reports_the_rest_as_not_run():
    proc, seconds = _timed("check", f"{H}:hangs_on_ten_classes", "--kind", "categorical", "--call-timeout",
                           "30", "--time-budget", "3")
    assert proc.returncode == 1
    # the budget runs out while the checks' functions are traced ahead (the hanging shape is traced
    # there): every check is then reported as not run, naming where the time went
    assert "not run: time-budget=3 s: the battery's time budget ran out during" in proc.stdout
    assert proc.stdout.count("ERR ") == 11
    assert seconds < 3 + 20


def test_the_api_takes_the_budgets_and_stops_a_hanging_check():
    from tests.hostile.losses import hangs_on_ten_classes

    result = run(declare(hangs_on_ten_classes, kind="categorical"), effort="quick", call_timeout=1,
                 only=["finite", "deterministic"], cells=[__import__("lossguard").cases.Cell(16, 10)])
    finite = result.check("finite")
    assert finite.verdict == "error" and "did not return within 1 s" in finite.summary


def test_a_deadline_restores_the_previous_alarm_handler_and_timer():
    def mine(signum, frame):  # a handler of the caller's own
        pass

    before = signal.signal(signal.SIGALRM, mine)
    signal.setitimer(signal.ITIMER_REAL, 100.0)
    try:
        with pytest.raises(CallTimeout):
            with deadline(5.0, lambda: CallTimeout("outer")):
                with deadline(0.05, lambda: CallTimeout("inner")):
                    time.sleep(2)
        assert signal.getsignal(signal.SIGALRM) is mine
        left = signal.getitimer(signal.ITIMER_REAL)[0]
        assert 90.0 < left <= 100.0
    finally:
        signal.setitimer(signal.ITIMER_REAL, 0)
        signal.signal(signal.SIGALRM, before)


def test_a_piped_run_writes_heartbeat_lines(monkeypatch):
    monkeypatch.setattr(progress, "HEARTBEAT_AFTER", 0.05)
    beats = io.StringIO()
    with progress.progress_for(io.StringIO(), heartbeat=beats) as update:
        update("gradient", 2, 14)
        time.sleep(0.3)
    assert "lossguard: still running: gradient, 2 of 14 done" in beats.getvalue()


# -- memory (item 2) ------------------------------------------------------------------------
def test_a_huge_class_count_is_refused_before_it_allocates():
    # before: grew to 24 GB and was killed by the kernel after 93 s
    proc, seconds = _timed("check", EXAMPLE, "--kind", "categorical", "--classes", "100000")
    assert proc.returncode == 2 and proc.stderr.count("\n") == 1
    assert "check dtypes would need about" in proc.stderr and "(4096, 100000)" in proc.stderr
    assert seconds < 30
    peak = resource.getrusage(resource.RUSAGE_CHILDREN).ru_maxrss * 1024
    assert peak < default_budget()


def test_a_memory_budget_below_a_check_names_it(capsys):
    refused(capsys, "memory-budget=0.01 GiB: check ", "check", EXAMPLE, "--kind", "categorical",
            "--memory-budget", "0.01", *QUICK)


@pytest.mark.parametrize("flag, value, fragment", [
    ("--memory-budget", "-1", "memory_budget=-1.0: expected a positive number of GiB"),
    ("--call-timeout", "0", "call_timeout=0.0: expected a positive number of seconds"),
    ("--time-budget", "-5", "time_budget=-5.0: expected a positive number of seconds"),
    ("--seed", "-1", "seed=-1: expected a non-negative integer"),
])
def test_bad_budgets_and_seeds_are_refused(capsys, flag, value, fragment):
    refused(capsys, fragment, "check", EXAMPLE, "--kind", "categorical", flag, value, *QUICK)


# -- report paths (item 5) ------------------------------------------------------------------
@pytest.mark.parametrize("flag", ["--json", "--markdown"])
def test_a_report_into_a_missing_folder_is_refused_before_the_battery(capsys, tmp_path, flag):
    # before: FileNotFoundError with a traceback after the whole battery had run
    out, _ = refused(capsys, "expected a file in an existing folder", "check", EXAMPLE, "--kind", "categorical",
                     flag, str(tmp_path / "no" / "such" / "r.out"), *QUICK)
    assert out == ""


def test_a_report_path_that_is_a_folder_is_refused(capsys, tmp_path):
    refused(capsys, "expected a file path, not a folder", "check", EXAMPLE, "--kind", "categorical",
            "--json", str(tmp_path), *QUICK)


def test_a_report_path_under_a_file_is_refused(capsys, tmp_path):
    (tmp_path / "plain").write_text("x")
    refused(capsys, "expected a file in a folder", "check", EXAMPLE, "--kind", "categorical",
            "--markdown", str(tmp_path / "plain" / "r.md"), *QUICK)


@pytest.mark.skipif(not os.path.exists("/dev/full"), reason="needs /dev/full")
def test_a_write_that_fails_after_the_battery_is_one_line(capsys):
    out, err = refused(capsys, "--json='/dev/full': expected a report written there", "check", EXAMPLE,
                       "--kind", "categorical", "--json", "/dev/full", *QUICK, "--only", "shift")
    assert "shift" in out  # the report itself was printed


def test_profile_png_into_a_missing_folder_is_refused(capsys, tmp_path):
    refused(capsys, "--png=", "profile", EXAMPLE, "--kind", "categorical", "--png", str(tmp_path / "x" / "p.png"))


def test_compare_json_into_a_folder_is_refused(capsys, tmp_path):
    refused(capsys, "expected a file path, not a folder", "compare", EXAMPLE, EXAMPLE, "--kind", "categorical",
            "--json", str(tmp_path))


# -- inputs changed in place (item 4) --------------------------------------------------------
@pytest.mark.parametrize("name, arg", [("shifts_in_place_np", "predictions"), ("zeroes_labels_np", "targets")])
def test_a_numpy_loss_that_writes_into_its_inputs_fails_inputs_intact(capsys, name, arg):
    code, out, _ = cli(capsys, "check", f"{H}:{name}", "--kind", "categorical", *QUICK, "--only", "inputs-intact")
    assert code == 1
    assert f"FAIL  inputs-intact  the loss changed its {arg} in place on 3 of 3 cases" in out
    assert "hint: the loss wrote into an input array" in out


def test_a_torch_loss_that_shifts_in_place_fails_and_a_correct_one_passes(capsys):
    pytest.importorskip("torch")
    bad = "tests/hostile/torch_losses.py"
    code, out, _ = cli(capsys, "check", f"{bad}:shifts_in_place", "--kind", "categorical", *QUICK,
                       "--only", "inputs-intact")
    assert code == 1 and "adapter=torch" in out and "changed its predictions in place" in out
    code, out, _ = cli(capsys, "check", f"{bad}:correct", "--kind", "categorical", *QUICK, "--only", "inputs-intact")
    assert code == 0 and "torch arrays" in out


@pytest.mark.parametrize("name", ["good", "good_np"])
def test_losses_that_leave_their_inputs_alone_pass_inputs_intact(capsys, name):
    code, out, _ = cli(capsys, "check", f"{H}:{name}", "--kind", "categorical", *QUICK, "--only", "inputs-intact")
    assert code == 0 and "ok    inputs-intact" in out


# -- consistent skips and flags (item 7) -----------------------------------------------------
def test_a_correct_numpy_loss_without_grad_passes_with_the_gradient_checks_skipped(capsys):
    # before: gradient skipped but live-gradient ERR, so a correct numpy loss exited 1
    code, out, _ = cli(capsys, "check", f"{H}:good_np", "--kind", "categorical", *QUICK)
    assert code == 0, out
    assert "skip  live-gradient  needs a gradient" in out and "--grad" in out


@pytest.mark.parametrize("argv, fragment", [
    (["check", ".:f", "--kind", "categorical"], "not a folder; try ./losses.py:f"),  # before: an internal TypeError
    (["check", "tests/hostile:f", "--kind", "categorical"], "not a folder"),
    (["check", "tests/hostile/empty.py:f", "--kind", "categorical"], "defines no functions; define f there"),
    (["check", EXAMPLE, "--kind", "categorical", "--param", "weight=[1,2"], "expected a valid JSON value"),
    (["check", EXAMPLE, "--kind", "categorical", "--only", "finite", "--skip", "finite"],
     "expected at least one check to run"),
    (["compare", EXAMPLE, EXAMPLE, "--kind", "categorical", "--skip", "finite"], "no check names with compare"),
    (["compare", EXAMPLE, EXAMPLE, "--kind", "categorical", "--expect", "proper"], "drop --expect"),
    # kinds that already worked, kept working
    (["check", "missing_file.py:f", "--kind", "categorical"], "expected an existing .py file"),
    (["check", "os.path:sep", "--kind", "categorical"], "expected a callable"),
    (["check", f"{H}:NOT_CALLABLE", "--kind", "categorical"], "expected a callable"),
    (["check", "lossguard/examples/reef_survey.py:tile_los", "--kind", "categorical"], "try 'tile_loss'"),
    (["check", "tests/hostile/breaks_on_import.py:f", "--kind", "categorical"], "a module that imports cleanly"),
    (["check", f"{H}:raises", "--kind", "categorical"], "raised RuntimeError: boom"),
    (["check", f"{H}:one_argument", "--kind", "categorical"], "check its signature"),
    (["check", EXAMPLE, "--kind", "categorical", "--skip", "finit"], "try 'finite'"),
    (["check", EXAMPLE, "--kind", "categorical", "--expect", "second_order"], "try 'second-order'"),
    (["check", EXAMPLE, "--kind", "categorical", "--param", "=3"], "KEY=VALUE"),
    (["check", EXAMPLE, "--kind", "binary", "--ignore-label", "-1"], "ignore_label=-1"),
    (["check", EXAMPLE, "--kind", "categorical", "--classes", "1"], "expected an integer >= 2"),
    (["check", EXAMPLE, "--kind", "categorical", "--reference", "categorical_cee"], "try 'categorical_ce'"),
    (["check", EXAMPLE, "--kind", "categorical", "--reference", "bce"], "a reference defined for kind='categorical'"),
    (["check", EXAMPLE, "--kind", "categorical", "--grad", "lossguard/examples/reef_survey.py:nothing"],
     "--grad="),
    (["check", EXAMPLE, "--kind", "binary"], "loss="),
    (["compare", EXAMPLE, "missing.py:f", "--kind", "categorical"], "NEW='missing.py': expected an existing .py file"),
])
def test_bad_input_is_one_line_and_exit_two(capsys, argv, fragment):
    refused(capsys, fragment, *argv)


def test_an_optional_check_names_the_flag_that_turns_it_on(capsys):
    code, out, _ = cli(capsys, "check", EXAMPLE, "--kind", "categorical", *QUICK, "--only", "shift",
                       "--only", "second-order")
    assert code == 0 and "skip  second-order" not in out  # --only runs it
    code, out, _ = cli(capsys, "check", EXAMPLE, "--kind", "categorical", *QUICK, "--only", "shift")
    spec = declare(lambda z, y: z.mean(), kind="categorical")
    from lossguard.checks import select_checks

    reasons = dict((c.name, r) for c, r in select_checks(spec))
    assert reasons["second-order"].startswith("optional: turn on with --expect second-order")


# -- replay lines that reproduce (item 6) ----------------------------------------------------
def test_a_pasted_replay_line_gives_the_reported_value_bit_for_bit():
    from tests.hostile.losses import negative

    result = run(declare(negative, kind="categorical"), effort="quick", only=["nonnegative"])
    example = result.check("nonnegative").worst[0]
    line = example.replay.split("   # ")[0]
    assert line.startswith("jax.enable_x64(True)(loss)(np.array(")

    def paste(call: str) -> str:  # a fresh process, JAX's 64-bit mode off as it starts
        code = f"import numpy as np, jax\nfrom tests.hostile.losses import negative as loss\nprint(float({call}).hex())"
        proc = subprocess.run([sys.executable, "-c", code], capture_output=True, text=True, cwd=ROOT,
                              env={**os.environ, "PYTHONPATH": ROOT})
        assert proc.returncode == 0, proc.stderr
        return proc.stdout.strip()

    assert paste(line) == float(example.got).hex()
    # the line as it was printed before (no 64-bit scope) ran in float32 and gave another value
    assert paste(line.replace("jax.enable_x64(True)(loss)", "loss", 1)) != float(example.got).hex()


def test_json_report_keeps_its_shape_with_the_new_check(capsys, tmp_path):
    path = tmp_path / "r.json"
    code, _, _ = cli(capsys, "check", EXAMPLE, "--kind", "categorical", *QUICK, "--only", "inputs-intact",
                     "--json", str(path))
    assert code == 0
    data = json.loads(path.read_text())
    assert [c["name"] for c in data["checks"]] == ["inputs-intact"]
    assert np.isfinite(data["seconds"])


def test_compare_with_a_loss_that_returns_none_past_the_probe_is_one_line(capsys):
    refused(capsys, "returned None", "compare", f"{H}:good", f"{H}:none_in_float64", "--kind", "categorical",
            *QUICK)


def test_check_with_a_loss_that_returns_none_past_the_probe_reports_the_checks_that_met_it(capsys):
    code, out, _ = cli(capsys, "check", f"{H}:none_in_float16", "--kind", "categorical", *QUICK,
                       "--only", "dtypes", "--only", "shift")
    assert code == 1
    assert "ERR   dtypes" in out and "returned None" in out and "ok    shift" in out

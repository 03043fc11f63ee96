"""``compare`` and ``profile`` honour ``--call-timeout`` and ``--time-budget`` as ``check`` does.

Before: both commands accepted the flags and ignored them; a loss that sleeps on every call kept
``compare`` busy until the test gave up. Each run is a subprocess, timed from outside; the losses
are in ``tests/hostile/losses.py``.
"""

from __future__ import annotations

import pytest

from lossguard import declare
from lossguard.compare import compare
from lossguard.errors import SpecError
from lossguard.profile import profile
from tests.hostile.losses import good
from tests.test_hostile import H, _timed

SLACK = 20  # starting Python and JAX on a loaded machine


@pytest.mark.parametrize("argv", [
    ["compare", f"{H}:good", f"{H}:sleeps"],
    ["profile", f"{H}:sleeps"],
])
def test_a_sleeping_loss_ends_promptly_at_the_call_timeout_with_one_line(argv):
    proc, seconds = _timed(*argv, "--kind", "categorical", "--call-timeout", "1", timeout=90)
    assert proc.returncode == 2, proc.stdout + proc.stderr
    assert proc.stderr.count("\n") == 1 and proc.stderr.startswith("lossguard: ")
    assert f"loss={H}:sleeps: a call with predictions of shape (8, 3) in float32 did not return within 1 s" \
        in proc.stderr
    assert "try a larger --call-timeout" in proc.stderr
    assert seconds < 1 + SLACK


def test_compare_stops_a_call_past_the_probe_naming_the_shape():
    # correct at the probe's (8, 3); hangs at the menu's (16, 10), met only while comparing
    proc, seconds = _timed("compare", f"{H}:good", f"{H}:hangs_on_ten_classes", "--kind", "categorical",
                           "--call-timeout", "1", timeout=120)
    assert proc.returncode == 2, proc.stdout + proc.stderr
    assert proc.stderr.count("\n") == 1
    assert "shape (16, 10)" in proc.stderr and "did not return within 1 s" in proc.stderr
    assert "while comparing the two implementations" in proc.stderr
    assert seconds < 1 + SLACK


@pytest.mark.parametrize("argv", [
    ["compare", f"{H}:good", f"{H}:sleeps"],
    ["profile", f"{H}:sleeps"],
])
def test_the_time_budget_ends_compare_and_profile_with_one_line(argv):
    proc, seconds = _timed(*argv, "--kind", "categorical", "--call-timeout", "60", "--time-budget", "2",
                           timeout=90)
    assert proc.returncode == 2, proc.stdout + proc.stderr
    assert proc.stderr.count("\n") == 1
    assert "time-budget=2 s: expected the " in proc.stderr and "try a larger --time-budget" in proc.stderr
    assert seconds < 2 + SLACK


def test_the_api_checks_the_limits():
    spec = declare(good, kind="categorical")
    with pytest.raises(SpecError, match="call_timeout=0: expected a positive number of seconds"):
        compare(spec, spec, call_timeout=0)
    with pytest.raises(SpecError, match="time_budget=-1: expected a positive number of seconds"):
        profile(spec, time_budget=-1)

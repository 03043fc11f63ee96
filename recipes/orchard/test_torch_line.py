"""Recipe 7 — PyTorch losses in the test suite: a function, a module class with constructor
arguments, and a custom autograd.Function with a hand-written backward pass.

A module *class* is declared with its constructor arguments as ``params`` (lossguard builds it once
and runs it in eval mode; ``train=True`` judges train mode). A known slip can be pinned with the
``run_battery`` fixture, so the suite stays green while proving the check still catches it.

    pytest recipes/orchard/test_torch_line.py --lossguard-effort quick
"""

from __future__ import annotations

from torch_grading import BlemishFocal, ripeness_ce, stem_logistic, stem_logistic_draft

from lossguard.pytest_plugin import battery

test_ripeness = battery(ripeness_ce, kind="categorical", reference="categorical_ce")
test_blemish = battery(BlemishFocal, kind="categorical", reference="focal_multiclass",
                       params={"gamma": 2.0}, only=["reference", "gradient", "finite"])
test_stems = battery(stem_logistic, kind="binary", reference="bce", only=["reference", "gradient"])


def test_the_draft_backward_is_caught(run_battery):
    result = run_battery(stem_logistic_draft, kind="binary", reference="bce", only=["gradient"],
                         require_pass=False)
    assert result.check("gradient").verdict == "fail"

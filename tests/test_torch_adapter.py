"""Losses written in PyTorch go through the torch adapter (skipped where torch is absent)."""

from __future__ import annotations

import numpy as np
import pytest

torch = pytest.importorskip("torch")
F = torch.nn.functional

from lossguard import declare, run  # noqa: E402
from lossguard.evaluate import Evaluator  # noqa: E402


def torch_ce(z, y):
    return F.cross_entropy(z, y)


def torch_ce_naive(z, y):
    return -torch.log(torch.softmax(z, -1).gather(1, y[:, None])).mean()


def test_torch_loss_is_detected_and_matches_the_reference():
    ev = Evaluator(declare(torch_ce, kind="categorical"))
    assert ev.adapter.name == "torch" and ev.output == "scalar"
    result = run(declare(torch_ce, kind="categorical", reference="categorical_ce"), effort="quick",
                 only=["reference", "gradient"])
    assert result.ok, [c.summary for c in result.checks]


def test_torch_float16_mean_overflow_is_found():
    # Seen on this machine with torch 2.13 CPU: F.cross_entropy's float16 mean of 8 rows each
    # worth 2e4 returns inf although the mean fits in float16 (IEEE 754 binary16 max = 65504):
    # the sum is accumulated in float16. lossguard must report exactly that, and only in float16.
    z = torch.tensor([[-1e4, 1e4, 0.0]] * 8, dtype=torch.float16)
    if torch.isfinite(F.cross_entropy(z, torch.zeros(8, dtype=torch.long))):
        pytest.skip("this torch build accumulates float16 means in a wider type")
    # rows wrong by 1e4 lie beyond the default |z| ≤ 1e3: the whole format is declared
    finite = run(declare(torch_ce, kind="categorical", reference="categorical_ce", max_logit="full"),
                 effort="quick", only=["finite"]).check("finite")
    assert finite.verdict == "fail"
    per_dtype = finite.details["failed_per_dtype"]
    assert per_dtype["float16"] > 0
    assert per_dtype["bfloat16"] == per_dtype["float32"] == per_dtype["float64"] == 0


def test_torch_naive_log_softmax_fails_finite_and_reference():
    result = run(declare(torch_ce_naive, kind="categorical", reference="categorical_ce"), effort="quick",
                 only=["reference", "finite"])
    assert result.check("reference").verdict == "fail"
    assert result.check("finite").verdict == "fail"


def test_torch_per_example_cotangent_is_passed_through():
    def rows(z, y):
        return F.cross_entropy(z, y, reduction="none")

    spec = declare(rows, kind="categorical")
    ev = Evaluator(spec)
    from lossguard.cases import random_stack, shape_menu

    stack = random_stack(spec, shape_menu(spec)[0], np.random.default_rng(1), 3)
    cot = np.random.default_rng(2).standard_normal((3, stack.cell.n))
    _, g1 = ev.value_and_grad(stack, "float64", cot)
    _, g0 = ev.value_and_grad(stack, "float64")
    # ∂⟨c, ℓ⟩/∂z_i = c_i ∂ℓ_i/∂z_i for a per-example loss (chain rule, common practice)
    np.testing.assert_allclose(g1, g0 * cot[..., None], rtol=1e-12, atol=1e-300)

"""Torch adapter: true forward mode, honest reporting where it is missing, modules, vmap, and the
user's torch state left as it was (skipped where torch is absent; CI installs it)."""

from __future__ import annotations

import numpy as np
import pytest

torch = pytest.importorskip("torch")
F = torch.nn.functional

from lossguard import declare, run  # noqa: E402
from lossguard.adapters.torch_loss import TorchAdapter  # noqa: E402
from lossguard.cases import random_stack, shape_menu  # noqa: E402
from lossguard.evaluate import Evaluator  # noqa: E402

from corpus import by_id  # noqa: E402
from corpus.torch_losses import _ce_function  # noqa: E402


def _gradient(fn, **decl):
    return run(declare(fn, kind="categorical", reference="categorical_ce", **decl), effort="quick",
               only=["gradient"]).check("gradient")


def test_a_wrong_jvp_is_caught_by_forward_against_reverse_only() -> None:
    c = _gradient(by_id("torch-function_jvp_scaled").fn)
    assert c.verdict == "fail"
    assert set(c.details["failed_pairs"]) == {"forward mode vs reverse mode"}, c.details["failed_pairs"]
    right = _gradient(lambda z, y: _ce_function()(z, y).mean())
    assert right.verdict == "pass" and "forward mode" in right.details["oracles"]


def test_a_function_without_jvp_says_forward_mode_was_not_compared() -> None:
    no_jvp = _ce_function(with_jvp=False, jvp_scale=1.1)
    c = _gradient(lambda z, y: no_jvp(z, y).mean())
    assert c.verdict == "pass"
    assert "forward mode" not in c.details["oracles"]
    note = [n for n in c.details["notes"] if "not compared" in n]
    assert note and "jvp" in note[0], c.details["notes"]
    assert "not compared" in c.summary


class _ModeScaled(torch.nn.Module):
    """Cross-entropy doubled in train mode (a stand-in for dropout-like behaviour)."""

    def __init__(self, scale: float = 1.0) -> None:
        super().__init__()
        self.scale = scale
        self.inner = torch.nn.Identity()
        self.seen: list[tuple[int, bool, bool]] = []

    def forward(self, z, y):
        self.seen.append((torch.get_num_threads(), torch.is_grad_enabled(), self.training))
        return self.scale * F.cross_entropy(self.inner(z), y) * (2.0 if self.training else 1.0)


def test_user_torch_state_is_left_as_it_was() -> None:
    module = _ModeScaled().train()
    before_dtype, before_threads = torch.get_default_dtype(), torch.get_num_threads()
    before_det = torch.are_deterministic_algorithms_enabled()
    torch.set_num_threads(2)
    torch.set_default_dtype(torch.float64)
    torch.use_deterministic_algorithms(True)
    try:
        with torch.no_grad():
            result = run(declare(module, kind="categorical", reference="categorical_ce"), effort="quick",
                         only=["reference", "gradient"])
            assert not torch.is_grad_enabled()
        assert torch.get_num_threads() == 2
        assert torch.get_default_dtype() == torch.float64
        assert torch.are_deterministic_algorithms_enabled()
        assert module.training and module.inner.training
    finally:
        torch.set_default_dtype(before_dtype)
        torch.set_num_threads(before_threads)
        torch.use_deterministic_algorithms(before_det)
    assert result.ok, [c.summary for c in result.checks]  # judged in eval mode: equals the reference
    threads = {t for t, _, _ in module.seen[1:]}  # after the probe, every call ran on one thread
    assert threads == {1}
    assert not any(training for _, _, training in module.seen)
    assert any("eval mode" in n for n in result.evaluation["notes"])


def test_a_module_class_is_built_with_the_params() -> None:
    ev = Evaluator(declare(_ModeScaled, kind="categorical", params={"scale": 3.0}))
    assert ev.adapter.name == "torch"
    stack = random_stack(ev.spec, shape_menu(ev.spec)[0], np.random.default_rng(0), 2)
    z, y = torch.tensor(stack.predictions[0]), torch.tensor(stack.targets[0])
    # three times F.cross_entropy (torch's own value)
    np.testing.assert_allclose(ev.values(stack)[0], 3.0 * float(F.cross_entropy(z, y)), rtol=1e-13)


@pytest.mark.parametrize("loss", [
    lambda z, y: F.cross_entropy(z, y),
    lambda z, y: F.cross_entropy(z, y, reduction="none"),
    lambda z, y: _ce_function()(z, y).mean(),
], ids=["mean", "per-example", "custom-function"])
def test_vmap_gives_the_loop_s_numbers(loss) -> None:
    spec = declare(loss, kind="categorical")
    stack = random_stack(spec, shape_menu(spec)[0], np.random.default_rng(3), 5)
    ev = Evaluator(spec)
    out = ev.cotangent_shape(stack)
    rng = np.random.default_rng(4)
    cot, v = rng.standard_normal((5,) + out), rng.standard_normal(stack.predictions.shape)
    z, y = stack.predictions, stack.targets
    results = []
    for batched in (False, True):
        a = TorchAdapter(loss, {}, batched=batched)
        a.out_shape = ev.adapter.out_shape
        results.append([a.values(z, y, "float64"), *a.value_and_grad(z, y, "float64", cot),
                        *a.jvp(z, y, v, "float64"), *a.hvp(z, y, v, "float64", cot)])
        assert not a.notes  # no fallback: vmap ran every operation
    for loop, vmapped in zip(*results):
        np.testing.assert_allclose(vmapped, loop, rtol=1e-12, atol=1e-15)


def test_a_loss_vmap_cannot_run_falls_back_once_and_says_so() -> None:
    def with_item(z, y):
        return F.cross_entropy(z, y) * (1.0 if float(z.max().item()) < 1e300 else 1.0)

    spec = declare(with_item, kind="categorical")
    stack = random_stack(spec, shape_menu(spec)[0], np.random.default_rng(3), 4)
    a = TorchAdapter(with_item, {}, batched=True)
    first = a.values(stack.predictions, stack.targets, "float64")
    again = a.values(stack.predictions, stack.targets, "float64")
    np.testing.assert_array_equal(first, again)
    assert len(a.notes) == 1 and "vmap could not run this loss (values" in a.notes[0]
    a.value_and_grad(stack.predictions, stack.targets, "float64")  # the other operations: no second try
    assert len(a.notes) == 1
    loop = TorchAdapter(with_item, {}).values(stack.predictions, stack.targets, "float64")
    np.testing.assert_array_equal(first, loop)


def _linear_then_ce(z, y):
    """A linear layer (CPU autocast runs matmul in bfloat16) before cross-entropy (autocast keeps
    that in float32): the float32 result carries bfloat16 rounding."""
    with torch.autocast("cpu", dtype=torch.bfloat16):
        return F.cross_entropy(z @ (1.375 * torch.eye(z.shape[-1], dtype=z.dtype)), y)


def test_declared_autocast_is_the_precision_judged() -> None:
    undeclared = run(declare(_linear_then_ce, kind="categorical"), effort="quick", only=["dtypes"])
    assert undeclared.check("dtypes").verdict == "fail"  # float32 held to float32's error model
    declared = run(declare(_linear_then_ce, kind="categorical", autocast="bfloat16"), effort="quick",
                   only=["dtypes"])
    assert declared.check("dtypes").verdict == "pass"
    assert any("float32 inputs judged at bfloat16's rounding" in n for n in declared.evaluation["notes"])


def test_train_mode_is_judged_when_declared() -> None:
    spec = dict(kind="categorical", reference="categorical_ce")
    assert run(declare(_ModeScaled, **spec), effort="quick", only=["reference"]).ok
    train = run(declare(_ModeScaled, train=True, **spec), effort="quick", only=["reference"])
    assert train.check("reference").verdict == "fail"  # doubled in train mode
    assert any("train mode" in n for n in train.evaluation["notes"])


def test_torch_declarations_are_refused_for_other_losses() -> None:
    import jax

    from lossguard.errors import SpecError

    def jax_ce(z, y):
        return -jax.numpy.mean(jax.nn.log_softmax(z)[jax.numpy.arange(len(y)), y])

    with pytest.raises(SpecError, match=r"autocast='bfloat16': expected a torch loss"):
        Evaluator(declare(jax_ce, kind="categorical", autocast="bfloat16"))
    with pytest.raises(SpecError, match=r"autocast='half': expected bfloat16 or float16"):
        declare(jax_ce, kind="categorical", autocast="half")


def test_cli_train_flag_reaches_the_module(capsys: pytest.CaptureFixture[str],
                                           monkeypatch: pytest.MonkeyPatch) -> None:
    from pathlib import Path

    from lossguard.cli import main

    monkeypatch.chdir(Path(__file__).resolve().parents[1])  # the paths are relative to the repository
    args = ["check", "recipes/orchard/torch_grading.py:BlemishFocal", "--kind", "categorical",
            "--reference", "focal_multiclass", "--param", "gamma=2.0", "--effort", "quick", "--only", "reference"]
    assert main(args) == 0 and "eval mode" in capsys.readouterr().out
    assert main(args + ["--train"]) == 0 and "run in train mode" in capsys.readouterr().out
    code = main(["check", "lossguard/examples/reef_survey.py:tile_loss", "--kind", "categorical",
                 "--autocast", "bfloat16", "--only", "finite"])
    assert code == 2
    err = capsys.readouterr().err.strip().splitlines()
    assert err == ["lossguard: autocast='bfloat16': expected a torch loss (this one runs on jax); try dropping autocast"]

"""A panel of real library losses, installed from the package index, run as a user would.

Each entry names the library function it wraps (optax 0.2.8, torch 2.13 ``torch.nn.functional``),
the checks that must pass, and the checks that must fail — each failure a true finding, with its
evidence in a comment. The wrappers only adapt the call convention ``loss(predictions, targets,
**params)``; the arithmetic is the library's.
"""

from __future__ import annotations

import pytest

from lossguard import declare, run

optax = pytest.importorskip("optax")
jax = pytest.importorskip("jax")
torch = pytest.importorskip("torch")
F = torch.nn.functional


# ----------------------------------------------------------------------------------- optax


def optax_ce(z, y):  # noqa: ANN001, ANN201
    return optax.softmax_cross_entropy_with_integer_labels(z, y).mean()


def optax_bce(z, y):  # noqa: ANN001, ANN201
    return optax.sigmoid_binary_cross_entropy(z, y).mean()


def optax_focal(z, y, gamma=2.0, alpha=0.25):  # noqa: ANN001, ANN201
    return optax.sigmoid_focal_loss(z, y, alpha=alpha, gamma=gamma).mean()


def optax_smoothed(z, y, epsilon=0.1):  # noqa: ANN001, ANN201
    onehot = jax.nn.one_hot(y, z.shape[-1], dtype=z.dtype)
    return optax.softmax_cross_entropy(z, optax.smooth_labels(onehot, epsilon)).mean()


def optax_kl_rows(z, y):  # noqa: ANN001, ANN201
    return optax.kl_divergence(jax.nn.log_softmax(z), y)


OPTAX = [
    (optax_ce, dict(kind="categorical", reference="categorical_ce")),
    (optax_bce, dict(kind="binary", reference="bce")),
    # alpha declared: optax's default is no class weighting (alpha=None)
    (optax_focal, dict(kind="binary", reference="focal_binary", params={"gamma": 2.0, "alpha": 0.25})),
    (optax_smoothed, dict(kind="categorical", reference="smoothed_ce", params={"epsilon": 0.1})),
    (optax_kl_rows, dict(kind="distribution", reference="kl_divergence", skip=["masking"])),
]


@pytest.mark.parametrize("loss,declared", OPTAX, ids=[f.__name__ for f, _ in OPTAX])
def test_optax_losses_pass_the_default_battery(loss, declared) -> None:  # noqa: ANN001
    r = run(declare(loss, **declared), effort="quick")
    assert r.ok, "\n".join(f"{c.name}: {c.summary}" for c in r.checks if not c.ok)


def test_optax_kl_divergence_gives_nan_on_masked_classes() -> None:
    # True finding: optax.kl_divergence computes Σ y (log y − log q) with log q = −inf on a masked
    # class whose target is 0, so 0 · (−inf) = nan in every row with a masked class (evidence: the
    # worst case's value is nan where the reference is finite). The default battery above skips
    # masking for this one loss only.
    r = run(declare(optax_kl_rows, kind="distribution", reference="kl_divergence"), effort="quick",
            only=["masking"])
    m = r.check("masking")
    assert m.verdict == "fail", m.summary
    assert "nan" in str(m.worst[0].got)


# ------------------------------------------------------------------- torch.nn.functional


def torch_ce(z, y):  # noqa: ANN001, ANN201
    return F.cross_entropy(z, y)


def torch_ce_smoothed(z, y, epsilon=0.1):  # noqa: ANN001, ANN201
    return F.cross_entropy(z, y, label_smoothing=epsilon)


def torch_bce_pos_weight(z, y, pos_weight=3.0):  # noqa: ANN001, ANN201
    return F.binary_cross_entropy_with_logits(z, y, pos_weight=torch.tensor(pos_weight, dtype=z.dtype))


STABILITY = ["reference", "finite", "dtypes"]


def test_torch_cross_entropy_passes_when_declared_for_float32_and_float64() -> None:
    r = run(declare(torch_ce, kind="categorical", reference="categorical_ce", dtypes="float32,float64"),
            effort="quick", only=STABILITY)
    assert r.ok, [c.summary for c in r.checks]


@pytest.mark.parametrize("loss,declared", [
    (torch_ce, dict(kind="categorical", reference="categorical_ce")),
    (torch_ce_smoothed, dict(kind="categorical", reference="smoothed_ce", params={"epsilon": 0.1})),
], ids=["cross_entropy", "cross_entropy_label_smoothing"])
def test_torch_cross_entropy_fails_the_float16_batch_on_the_cpu(loss, declared) -> None:  # noqa: ANN001
    # True finding: on the CPU, F.cross_entropy given float16 reduces its mean in float16; 4096
    # examples with loss ≈ 32 sum past 65504, so the mean comes out inf though it is ≈ 32
    # (evidence: the worst case's value). Nobody runs this loss in float16 on a CPU, which is
    # what dtypes="float32,float64" declares (the test above).
    r = run(declare(loss, **declared), effort="quick", only=["dtypes"])
    d = r.check("dtypes")
    assert d.verdict == "fail" and "float16 large batch" in d.summary, d.summary


def test_torch_pos_weight_bce_passes_and_reports_its_edge_as_information() -> None:
    r = run(declare(torch_bce_pos_weight, kind="binary", reference="bce", params={"pos_weight": 3.0}),
            effort="quick", only=STABILITY)
    assert r.ok, [c.summary for c in r.checks]
    # at float16's largest value (65504) an intermediate overflows though the mean is
    # representable: outside the default |z| ≤ 1e3, so it is information on the passing line ...
    finite = r.check("finite")
    assert "beyond, first at |z| = 6.55e+04" in finite.summary, finite.summary
    # ... and a failure once the whole format is declared
    full = run(declare(torch_bce_pos_weight, kind="binary", reference="bce", params={"pos_weight": 3.0},
                       max_logit="full"), effort="quick", only=["finite"])
    assert full.check("finite").verdict == "fail", full.check("finite").summary

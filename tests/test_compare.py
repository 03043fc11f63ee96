"""``lossguard compare``: agreement of correct implementations, divergence pinpointed and shrunk."""

from __future__ import annotations

import json
from pathlib import Path

import jax
import jax.numpy as jnp
import numpy as np
import pytest

from lossguard import declare
from lossguard.cli import main
from lossguard.compare import compare
from lossguard.tolerance import unit_roundoff

HERE = Path(__file__).resolve().parent
FOCAL = HERE.parent / "recipes" / "orchard" / "bruise_focal.py"


def ce_log_softmax(z, y):  # type: ignore[no-untyped-def]
    return -jnp.mean(jnp.take_along_axis(jax.nn.log_softmax(z, axis=-1), y[:, None], axis=-1))


def ce_logsumexp(z, y):  # type: ignore[no-untyped-def]
    # CE = logsumexp(z) − z_y (common practice), a different operation order from log_softmax
    return jnp.mean(jax.nn.logsumexp(z, axis=-1) - jnp.take_along_axis(z, y[:, None], axis=-1)[:, 0])


def ce_numpy(z, y):  # type: ignore[no-untyped-def]
    m = z.max(axis=-1, keepdims=True)  # logsumexp(z) = m + log Σ exp(z − m)
    lse = m[:, 0] + np.log(np.exp(z - m).sum(axis=-1))
    return np.mean(lse - z[np.arange(len(y)), y])


def ce_off(z, y):  # type: ignore[no-untyped-def]
    return ce_log_softmax(z, y) * (1.0 + 1e-6)  # a relative error far above float64 rounding


def ce_per_example(z, y):  # type: ignore[no-untyped-def]
    return -jnp.take_along_axis(jax.nn.log_softmax(z, axis=-1), y[:, None], axis=-1)[:, 0]


def bce_softplus(z, y):  # type: ignore[no-untyped-def]
    # (1 − y)·softplus(z) + y·softplus(−z): the logistic loss with nothing cancelling (common practice)
    return jnp.mean((1 - y) * jax.nn.softplus(z) + y * jax.nn.softplus(-z))


def bce_naive(z, y):  # type: ignore[no-untyped-def]
    p = jax.nn.sigmoid(z)  # log(1 − p) = log 0 once p rounds to 1
    return -jnp.mean(y * jnp.log(p) + (1 - y) * jnp.log(1 - p))


def test_two_correct_implementations_agree() -> None:
    spec = declare(ce_log_softmax, kind="categorical")
    steps: list[tuple[str, int, int]] = []
    result = compare(spec, spec.with_loss(ce_logsumexp), effort="quick", progress=lambda *a: steps.append(a))
    assert result.agree and result.exit_code == 0
    assert steps[-1] == ("done", 2, 2) and [s[1] for s in steps] == [0, 1, 2]  # quick: one cell, two dtypes
    assert [p.name for p in result.parts] == ["value float64", "gradient float64", "value float32", "gradient float32"]
    assert all(p.verdict == "pass" and p.cases > 0 for p in result.parts)
    assert result.largest is None and result.smallest is None


def _without_timings(d: dict) -> str:  # type: ignore[type-arg]
    d = dict(d, seconds=0, parts=[dict(p, seconds=0) for p in d["parts"]])
    return json.dumps(d, default=str)


def test_a_small_value_error_diverges_and_shrinks_to_one_row() -> None:
    spec = declare(ce_log_softmax, kind="categorical")
    result = compare(spec, spec.with_loss(ce_off), seed=3, effort="quick", dtypes=("float64",))
    again = compare(spec, spec.with_loss(ce_off), seed=3, effort="quick", dtypes=("float64",))
    assert _without_timings(result.to_dict()) == _without_timings(again.to_dict())  # same seed, same report
    assert not result.agree and result.exit_code == 1
    value, grad = result.parts
    assert value.verdict == "fail" and grad.verdict == "fail"
    assert result.largest is not None and result.smallest is not None
    small = result.smallest
    assert np.asarray(small.predictions).shape[0] == 1  # one row of C logits
    # the shrunk case still shows the same divergence: NEW/OLD − 1 = 1e-6 up to rounding
    ratio = float(np.asarray(small.got)) / float(np.asarray(small.expected))
    assert ratio == pytest.approx(1.0 + 1e-6, rel=1e-9)


def test_binary_overflow_shrinks_to_one_saturated_element() -> None:
    spec = declare(bce_softplus, kind="binary")
    result = compare(spec, spec.with_loss(bce_naive), effort="quick", dtypes=("float64",))
    assert not result.agree
    small = result.smallest
    assert small is not None and np.asarray(small.predictions).shape == (1,)
    z, y = float(np.asarray(small.predictions)[0]), float(np.asarray(small.targets)[0])
    # σ(z) rounds to 1 in float64 once e^(−z) < u, i.e. z > 36.7; the naive form then takes log 0
    assert (z > 36.7 and y < 1) or (z < -36.7 and y > 0)
    assert np.isinf(np.asarray(small.got)).all() and np.isfinite(np.asarray(small.expected)).all()


def test_focal_power_against_log_space_pinpoints_saturated_gradients() -> None:
    from lossguard.loading import load_target

    old = declare(load_target(f"{FOCAL}:focal_v1"), kind="categorical", params={"gamma": 0.5})
    result = compare(old, old.with_loss(load_target(f"{FOCAL}:focal_v2")), effort="quick")
    verdicts = {p.name: p.verdict for p in result.parts}
    assert verdicts == {"value float64": "pass", "gradient float64": "fail",
                        "value float32": "pass", "gradient float32": "fail"}
    assert all(p.details["one_side_not_finite"] == p.failed for p in result.parts if p.verdict == "fail")
    for example in (result.largest, result.smallest):
        assert example is not None and example.what.startswith("gradient")
        old_g, new_g = np.asarray(example.expected), np.asarray(example.got)
        assert np.isnan(old_g).any() and np.isfinite(new_g).all()  # NaN against finite
    small = result.smallest
    z = np.asarray(small.predictions, dtype=np.float64)
    y = np.asarray(small.targets)
    assert z.shape[0] == 1
    dtype = small.what.split()[-1]
    # saturated: 1 − p_t is below the unit roundoff, so p_t rounds to 1 in this dtype
    log_p = z - np.log(np.exp(z - z.max(-1, keepdims=True)).sum(-1, keepdims=True)) - z.max(-1, keepdims=True)
    one_minus_pt = -np.expm1(log_p[0, y[0]])
    assert one_minus_pt < unit_roundoff(dtype)
    assert "shrunk to 1 of" in small.note


def test_cli_exit_codes_and_reports(tmp_path: Path, capsys: pytest.CaptureFixture[str]) -> None:
    here = f"{Path(__file__).resolve()}"
    out_json, out_md = tmp_path / "c.json", tmp_path / "c.md"
    code = main(["compare", f"{here}:ce_log_softmax", f"{here}:ce_numpy", "--kind", "categorical",
                 "--effort", "quick", "--json", str(out_json), "--markdown", str(out_md)])
    text = capsys.readouterr().out
    assert code == 0, text
    assert "the implementations agree (exit 0)" in text
    # a numpy loss with no declared gradient: values compared, gradients skipped with the reason
    assert any(line.split()[:3] == ["skip", "gradient", "float64"] and "not compared: NEW has no gradient" in line
               for line in text.splitlines())
    doc = json.loads(out_json.read_text())
    assert doc["schema"] == "lossguard-comparison/1" and doc["agree"] is True
    assert {p["name"]: p["verdict"] for p in doc["parts"]}["value float32"] == "pass"
    assert "| `value float64` | passed |" in out_md.read_text()

    code = main(["compare", f"{here}:ce_log_softmax", f"{here}:ce_per_example", "--kind", "categorical",
                 "--effort", "quick"])
    err = capsys.readouterr().err
    assert code == 2 and "expected the same output form as OLD (scalar)" in err
    code = main(["compare", f"{here}:ce_log_softmax", f"{here}:no_such_loss", "--kind", "categorical"])
    err = capsys.readouterr().err
    assert code == 2 and "no_such_loss" in err

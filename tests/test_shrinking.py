"""``lossguard check`` shows the smallest failing input it finds beside each failure's worst case.

Scenario: a glacier survey classifies drone frames of an ice front (categorical: calving, crevasse,
meltwater, clean ice), flags meltwater per pixel column (binary) and fits the mix of surface
types seen in a frame (distribution). The losses below are versions of theirs with one bug each.

The search itself (``lossguard._shrink``) is tested with plain numpy predicates (no JAX: each
candidate shape would be a compilation); the battery tests run one check at quick effort.
"""

from __future__ import annotations

import jax
import jax.numpy as jnp
import numpy as np
import pytest

from lossguard import declare, run
from lossguard._shrink import smallest_case
from lossguard.cli import main
from lossguard.effort import get_effort
from lossguard.references import evaluate_reference
from tests.corpus import by_id


def ce_rows(z: jax.Array, y: jax.Array) -> jax.Array:
    return jax.nn.logsumexp(z, axis=-1) - jnp.take_along_axis(z, y[:, None], axis=-1)[:, 0]


def front_loss(z: jax.Array, y: jax.Array) -> jax.Array:
    """Correct: the mean cross-entropy of the frames."""
    return ce_rows(z, y).mean()


def meltwater_overweighted(z: jax.Array, y: jax.Array) -> jax.Array:
    """Bug: a leftover class weight of 1.5 on label 2 (meltwater) in an unweighted mean."""
    return (ce_rows(z, y) * jnp.where(y == 2, 1.5, 1.0)).mean()


def over_distinct_labels(z: jax.Array, y: jax.Array) -> jax.Array:
    """Bug: the sum divided by the number of distinct labels in the batch, not by the rows: right
    whenever every row has its own label, so only two rows sharing a label show it."""
    classes = z.shape[-1]
    present = (jnp.zeros(classes).at[y].add(1.0) > 0).sum()
    return ce_rows(z, y).sum() / present


def _pair(spec, z, y):  # noqa: ANN001
    """(the loss's float64 value, the reference's) on one case."""
    with jax.enable_x64(True):
        got = float(spec.loss(jnp.asarray(z), jnp.asarray(y)))
    want = float(evaluate_reference("categorical_ce", z, y)[0])  # our own registry (tested elsewhere)
    return got, want


# ------------------------------------------------------------------ the battery: one row suffices
@pytest.mark.parametrize("entry, check", [
    ("numerics-log_of_softmax", "finite"),
    ("custom-grad-vjp_sign_flipped", "gradient"),
    ("masks-onehot_dot_picks_target", "masking"),
])
def test_a_failure_on_one_row_is_shrunk_to_one_row_of_two_classes(entry, check):
    res = run(by_id(entry).spec(), effort="quick", only=[check]).check(check)
    assert res.verdict == "fail"
    small = res.smallest
    assert small is not None, res.details
    assert np.shape(small.predictions) == (1, 2)
    assert np.shape(res.worst[0].predictions) == (8, 3)  # shown beside the worst case, not instead
    assert small.note.startswith("smallest failing input found: 1 row × 2 classes (the worst case has 8 rows × 3")
    assert small.replay.startswith("jax.enable_x64(") and "np.array([[" in small.replay
    assert res.details["shrink"] == "8 rows × 3 classes → 1 row × 2 classes"


def test_a_failure_tied_to_one_class_index_keeps_its_classes_and_fails_there():
    spec = declare(meltwater_overweighted, kind="categorical", reference="categorical_ce")
    res = run(spec, effort="quick", only=["reference"]).check("reference")
    small = res.smallest
    assert res.verdict == "fail" and small is not None
    z, y = np.asarray(small.predictions), np.asarray(small.targets)
    # the bug is tied to class index 2: cutting a class would renumber the label, so the three
    # classes stay, and the row is a meltwater row of the worst case
    assert z.shape == (1, 3) and y.tolist() == [2]
    wz, wy = np.asarray(res.worst[0].predictions), np.asarray(res.worst[0].targets)
    assert any(wy[r] == 2 and np.array_equal(wz[r], z[0]) for r in range(len(wy)))
    got, want = _pair(spec, z, y)
    assert abs(got - want) > 1e-3 * abs(want)  # it really fails there
    assert np.isclose(float(small.got), got) and np.isclose(float(small.expected), want)


def test_a_failure_that_needs_two_rows_is_not_shrunk_below_two():
    spec = declare(over_distinct_labels, kind="categorical", reference="categorical_ce")
    res = run(spec, effort="quick", only=["reference"]).check("reference")
    small = res.smallest
    assert res.verdict == "fail" and small is not None, res.details
    z, y = np.asarray(small.predictions), np.asarray(small.targets)
    assert z.shape[0] == 2 and y[0] == y[1]  # two rows sharing a label: the least that shows it
    got, want = _pair(spec, z, y)
    assert abs(got - want) > 0.1 * abs(want)
    for r in range(2):  # and each of its rows alone is fine
        got, want = _pair(spec, z[r:r + 1], y[r:r + 1])
        assert got == pytest.approx(want, rel=1e-12)


def test_a_correct_loss_is_never_shrunk(monkeypatch):
    import lossguard.checks._smallest as smallest

    def refuse(*args, **kwargs):  # noqa: ANN002, ANN003
        raise AssertionError("shrinking ran on a passing check")

    monkeypatch.setattr(smallest, "smallest_case", refuse)
    result = run(declare(front_loss, kind="categorical", reference="categorical_ce"), effort="quick",
                 only=["reference", "finite", "gradient", "masking"])
    assert result.ok, [c.summary for c in result.checks]
    assert all(c.smallest is None and "shrink" not in c.details and "shrink_seconds" not in c.details
               for c in result.checks)


def test_the_same_seed_gives_the_same_smallest_case():
    spec = declare(over_distinct_labels, kind="categorical", reference="categorical_ce")
    a, b = (run(spec, seed=7, effort="quick", only=["reference"]).check("reference").smallest for _ in range(2))
    assert a is not None and b is not None
    assert np.array_equal(a.predictions, b.predictions) and np.array_equal(a.targets, b.targets)
    assert a.replay == b.replay and a.note == b.note


def test_a_battery_stops_shrinking_once_its_calls_are_spent():
    from lossguard.checks import Context, get_check
    from lossguard.checks._smallest import add_smallest
    from lossguard.evaluate import Evaluator
    from lossguard.runner import run_check

    spec = declare(meltwater_overweighted, kind="categorical", reference="categorical_ce")
    ctx = Context(spec=spec, evaluator=Evaluator(spec), seed=0, effort="quick")
    check = get_check("reference")
    result = run_check(check, ctx)
    ctx.shrink_spent = 2 * ctx.effort.shrink_calls - 1  # one call left for the whole battery
    add_smallest(check, ctx, result)
    assert ctx.shrink_spent == 2 * ctx.effort.shrink_calls
    again = run_check(check, ctx)
    add_smallest(check, ctx, again)
    assert again.smallest is None and "for shrinking are spent" in again.details["shrink"]


def test_the_command_prints_the_smallest_input_with_its_replay_line(capsys):
    code = main(["check", "lossguard/examples/reef_survey.py:tile_loss_old", "--kind", "categorical",
                 "--reference", "categorical_ce", "--only", "finite", "--effort", "quick"])
    out = capsys.readouterr().out
    assert code == 1
    lines = out.splitlines()
    at = next(i for i, ln in enumerate(lines) if "smallest failing input found: 1 row × 2 classes" in ln)
    assert any(ln.strip().startswith("worst case:") for ln in lines[:at])  # beside the worst case
    replay = next(ln for ln in lines[at:] if ln.strip().startswith("replay:"))
    assert "np.array([[" in replay and "]]" in replay


# ------------------------------------------------------------------------- the search itself
def _nonfinite(stack):  # noqa: ANN001
    return ~np.isfinite(stack.predictions.reshape(len(stack), -1)).all(axis=1)


def test_the_search_keeps_the_label_renumbered_and_counts_its_calls():
    spec = declare(front_loss, kind="categorical")
    z = np.zeros((16, 10))
    z[11, 7] = np.nan
    y = np.arange(16) % 10
    found = smallest_case(spec, z, y, _nonfinite, max_calls=8)
    sz, sy = found.stack.predictions[0], found.stack.targets[0]
    assert sz.shape == (1, 2) and np.isnan(sz).sum() == 1 and found.calls == 1
    assert sy[0] in (0, 1) and np.isfinite(sz[0, sy[0]]) == (y[11] != 7)


def test_the_search_stops_at_its_cap_and_says_so():
    spec = declare(front_loss, kind="categorical")
    rng = np.random.default_rng(0)
    z, y = rng.standard_normal((64, 10)), rng.integers(0, 10, 64)
    calls = []

    def needs_every_row(stack):  # noqa: ANN001
        calls.append(stack.predictions.shape)
        return np.full(len(stack), stack.predictions.shape[1] == 64)  # only the whole case fails

    found = smallest_case(spec, z, y, needs_every_row, max_calls=3)
    assert found.calls == 3 == len(calls) and found.found_in is None and found.capped
    assert found.stack.predictions.shape[1:] == (64, 10)


def test_distribution_targets_are_renormalised_and_binary_columns_cut():
    spec = declare(front_loss, kind="distribution")
    z = np.zeros((4, 5))
    z[2, 3] = np.inf
    t = np.full((4, 5), 0.2)
    found = smallest_case(spec, z, t, _nonfinite, max_calls=8)
    assert found.stack.predictions.shape[1:] == (1, 2)
    assert found.stack.targets[0].sum(axis=-1) == pytest.approx(1.0)
    bspec = declare(lambda a, b: a.mean(), kind="binary")
    zb = np.zeros((8, 5))
    zb[5, 4] = -np.inf
    found = smallest_case(bspec, zb, np.ones((8, 5)), _nonfinite, max_calls=8)
    assert found.stack.predictions[0].tolist() == [[-np.inf]]


def test_all_ignored_rows_are_never_a_candidate_and_class_counts_fixed_by_the_declaration_stay():
    spec = declare(front_loss, kind="categorical", ignore_label=-1, classes=4)
    z = np.zeros((4, 4))
    z[1, 2] = np.nan
    y = np.array([-1, -1, 3, 0])
    seen = []

    def fails(stack):  # noqa: ANN001
        seen.append(stack.targets.copy())
        return _nonfinite(stack)

    found = smallest_case(spec, z, y, fails, max_calls=8)
    assert all(np.any(t != -1, axis=-1).all() for t in seen)  # no candidate of ignored rows only
    assert found.found_in is None or found.stack.predictions.shape[-1] == 4


def test_the_effort_profiles_bound_the_calls():
    assert [get_effort(e).shrink_calls for e in ("quick", "default", "thorough")] == [6, 8, 16]

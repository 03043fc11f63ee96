"""Row packing of the gradient check's special points, and the per-case comparison's arithmetic.

``Mismatch`` computes its per-case figures with few full-size temporaries (a large shape pays for
each); here it is held against the plain element-wise definition on random arrays laced with
the IEEE-754 special values (±0, ±inf, nan, huge, tiny).
"""

from __future__ import annotations

import jax
import jax.numpy as jnp
import numpy as np

from lossguard import declare
from lossguard.cases import Cell
from lossguard.checks import Context
from lossguard.checks._compare import Mismatch
from lossguard.checks.gradient import special_cases
from lossguard.evaluate import Evaluator


def ce(z, y):
    return -jnp.mean(jnp.take_along_axis(jax.nn.log_softmax(z), y[:, None], axis=-1))


def test_special_points_keep_six_cases_at_the_menu_and_pack_into_one_at_a_large_shape():
    spec = declare(ce, kind="categorical")
    ctx = Context(spec=spec, evaluator=Evaluator(spec))
    small = special_cases(ctx, Cell(16, 10))
    assert len(small) == 6
    big = special_cases(ctx, Cell(1200, 2000))  # 2.4 million logits per case
    assert len(big) == 1
    rows = big.predictions[0]
    # row r comes from special case r mod 6: case 0 is all zeros, case 5 has every class tied at 3
    assert np.all(rows[0::6] == 0.0) and np.all(rows[5::6] == 3.0)
    assert all(k in big.note(0) for k in ("all zero", "all tied", "branch thresholds"))


def _plain(g, e, atol):
    """The definition, one full-size array per quantity."""
    a = np.broadcast_to(atol, np.broadcast_shapes(g.shape, np.shape(atol)))
    k = g.shape[0]
    with np.errstate(all="ignore"):
        diff = np.abs(g - e)
        same = (g == e) | (np.isnan(g) & np.isnan(e))
        fin = np.isfinite(g) & np.isfinite(e)
        bad = ~same & (~fin | (diff > a))
        ratio = np.where(fin, diff / a, np.where(same, 0.0, np.inf))
        absolute = np.where(fin, diff, np.where(same, 0.0, np.inf))
        rel = np.where(fin & (np.abs(e) > 0), diff / np.abs(e), np.where(fin, diff, np.inf))
    per = lambda x, f: f(x.reshape(k, -1), axis=1)  # noqa: E731
    return bad, per(bad, np.any), per(ratio, np.max), per(absolute, np.max), per(rel, np.max)


def test_mismatch_equals_its_plain_definition_with_special_values():
    rng = np.random.default_rng(11)
    specials = np.array([0.0, -0.0, np.inf, -np.inf, np.nan, 1.0, 1e-300, 1e300])  # IEEE-754 special and extreme values
    for trial in range(200):
        shape = (int(rng.integers(1, 5)),) + tuple(int(n) for n in rng.integers(1, 4, size=rng.integers(0, 3)))
        g = rng.standard_normal(shape)
        e = g + rng.standard_normal(shape) * 10.0 ** rng.uniform(-20, 0)
        for arr in (g, e):
            m = rng.random(shape) < 0.3
            arr[m] = rng.choice(specials, size=int(m.sum()))
        if trial % 4 == 0:
            e = np.where(rng.random(shape) < 0.5, g, e)
        atol = [1e-12, rng.random(shape) * 1e-3, np.zeros(shape[:1] + (1,) * (len(shape) - 1))][trial % 3]
        m = Mismatch(g, e, atol)
        want = _plain(g, e, atol)
        got = (m.bad_elements, m.case_bad, m.case_ratio, m.case_abs, m.case_rel)
        for x, y in zip(got, want):
            assert np.array_equal(x, y, equal_nan=True), trial


def test_a_replay_with_infinities_and_nans_runs_and_gives_the_same_arrays() -> None:
    # masked logits are −inf and a broken loss may be fed nan: repr writes them as bare names,
    # which a pasted line cannot evaluate; the replay writes np.inf and np.nan instead
    from lossguard.checks._compare import replay

    spec = declare(lambda z, y: z, kind="binary")
    z = np.array([[1.5, -np.inf, np.inf], [np.nan, 0.1 + 0.2, -0.0]])
    y = np.array([[1.0, 0.0, 1.0], [0.0, 1.0, 0.5]])
    seen: list[tuple[np.ndarray, np.ndarray]] = []
    exec(replay(spec, z, y), {"np": np, "loss": lambda a, b: seen.append((a, b))})  # noqa: S102 - our own line
    a, b = seen[0]
    assert a.tobytes() == z.tobytes() and b.tobytes() == y.tobytes()  # bit for bit, −0.0 and 0.1 + 0.2 included


def test_a_large_case_is_named_not_written_out() -> None:
    # one (4096, 1000) case written out made a 74 MB replay line; past INLINE_VALUES the line calls
    # loss(z, y) and says what z and y are
    from lossguard.checks._compare import INLINE_VALUES, replay

    spec = declare(lambda z, y, margin=0.0: z.sum() + margin, kind="categorical", params={"margin": 0.5})
    z, y = np.zeros((INLINE_VALUES // 10, 10)), np.zeros(INLINE_VALUES // 10, dtype=np.int64)
    line = replay(spec, z, y)
    assert len(line) < 400 and "(1000, 10)" in line and "int64 (1000,)" in line
    seen: list[tuple[object, ...]] = []
    exec(line, {"np": np, "z": z, "y": y, "loss": lambda *a, **k: seen.append((a, k))})  # noqa: S102 - our own line
    assert seen[0][0][0] is z and seen[0][1] == {"margin": 0.5}
    small = replay(spec, z[:5], y[:5])
    assert small.startswith("loss(np.array([[0.0,")  # small cases are still written out

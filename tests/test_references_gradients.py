"""Hand-derived reference gradients against JAX autodiff, mpmath, and published worked facts.

Scenario: a greenhouse controller classifying leaf images into C disease classes (categorical),
flagging wilting per sensor (binary), and matching a pest-species mix (distribution).
"""

from __future__ import annotations

import math
from typing import Any

import jax
import jax.numpy as jnp
import mpmath
import numpy as np
import pytest
import scipy.special as sp

from _closeness import assert_close, close
from lossguard.references import REFERENCES, softmax_ce_hessian

BCE, CE, SM = REFERENCES["bce"], REFERENCES["categorical_ce"], REFERENCES["smoothed_ce"]
FB, FM, KL = REFERENCES["focal_binary"], REFERENCES["focal_multiclass"], REFERENCES["kl_divergence"]
N, C = 6, 4
RTOL_AD, ATOL_AD = 1e-11, 1e-15  # closed form vs autodiff, both float64 (few-ULP agreement)
TINY = 1e-300  # below the smallest normal double 2^-1022 (IEEE-754) compare absolutely


def leaf_case(name: str, inputs: str, target: str, scale: float,
              seed: int) -> tuple[np.ndarray, np.ndarray]:
    rng = np.random.default_rng(seed)
    binary = name in ("bce", "focal_binary")
    shape = (N, 3) if binary else (N, C)
    z = rng.normal(0.0, scale, shape)
    if inputs == "probabilities":
        z = rng.uniform(0.02, 0.98, shape) if binary else sp.softmax(z, axis=-1)
    if binary:
        y = rng.integers(0, 2, shape).astype(float)
        return z, (np.where(rng.random(shape) < 0.5, y, rng.random(shape)) if target == "soft" else y)
    if target == "labels":
        return z, rng.integers(0, C, N)
    rows = rng.dirichlet(np.ones(C), N)
    rows[0] = np.eye(C)[2]
    rows[1, 0] = 0.0
    return z, rows / rows.sum(-1, keepdims=True)


AD_CASES: list[tuple[str, str, str, dict[str, Any]]] = [
    ("bce", "logits", "soft", {}),
    ("bce", "logits", "soft", {"pos_weight": 2.5}),
    ("bce", "probabilities", "soft", {"pos_weight": 0.4}),
    ("categorical_ce", "logits", "labels", {}),
    ("categorical_ce", "logits", "rows", {"weight": [0.5, 1.0, 2.0, 3.0]}),
    ("categorical_ce", "probabilities", "labels", {}),
    ("categorical_ce", "probabilities", "rows", {"weight": [1.0, 0.2, 2.0, 1.0]}),
    ("smoothed_ce", "logits", "labels", {"epsilon": 0.0}),
    ("smoothed_ce", "logits", "labels", {"epsilon": 0.2}),
    ("focal_binary", "logits", "hard", {"gamma": 0.0, "alpha": None}),
    ("focal_binary", "logits", "hard", {"gamma": 0.5, "alpha": 0.25}),
    ("focal_binary", "logits", "hard", {"gamma": 2.0, "alpha": 0.8}),
    ("focal_binary", "logits", "soft", {"gamma": 1.5, "alpha": 0.3}),
    ("focal_multiclass", "logits", "labels", {"gamma": 0.5}),
    ("focal_multiclass", "logits", "labels", {"gamma": 2.0, "alpha": [0.1, 0.4, 0.2, 0.3]}),
    ("kl_divergence", "logits", "rows", {}),
]


def autodiff_vjp(name: str, z: np.ndarray, y: np.ndarray, inputs: str, params: dict[str, Any],
                 cot: np.ndarray) -> np.ndarray:
    ref = REFERENCES[name]
    with jax.enable_x64(True):
        fn = lambda zz: ref.jax_per_example(zz, jnp.asarray(y), inputs=inputs, **params)  # noqa: E731
        _, pull = jax.vjp(fn, jnp.asarray(z, dtype=jnp.float64))
        return np.asarray(pull(jnp.asarray(cot))[0])


# logits at two scales (moderate, and large enough to saturate most probabilities)
AD_SCALED = [(*case, s) for case in AD_CASES for s in (3.0, 25.0) if case[1] == "logits" or s == 3.0]


@pytest.mark.parametrize("name,inputs,target,params,scale", AD_SCALED)
def test_closed_form_gradient_matches_jax_autodiff(name: str, inputs: str, target: str,
                                                   params: dict[str, Any], scale: float) -> None:
    z, y = leaf_case(name, inputs, target, scale, seed=len(name) + int(scale))
    ref = REFERENCES[name]
    out_shape = np.shape(ref.per_example(z, y, inputs=inputs, **params))
    cot = np.random.default_rng(7).uniform(0.5, 2.0, out_shape)
    want = autodiff_vjp(name, z, y, inputs, params, cot)  # jax.vjp of the JAX twin (float64)
    g = ref.per_example_grad(z, y, inputs=inputs, **params)
    got = g * (cot if g.ndim == cot.ndim else cot[:, None])
    assert_close(got, want, RTOL_AD, ATOL_AD)
    with jax.enable_x64(True):  # the twin computes the same value as the numpy reference
        twin = np.asarray(ref.jax_per_example(jnp.asarray(z), jnp.asarray(y), inputs=inputs, **params))
    assert_close(twin, ref.per_example(z, y, inputs=inputs, **params), 1e-12, 1e-15)


# ------------------------------------------------------------------ mpmath at extreme logits

GRID = [-1e4, -745.0, -700.0, -40.0, -5.0, -1e-8, 0.0, 1e-8, 5.0, 40.0, 700.0, 745.0, 1e4]


def mp_focal_binary(v: Any, y: float, gamma: float, alpha: float | None) -> Any:
    # Lin et al. (ICCV 2017): α_t (1 − p_t)^γ (−log p_t), with t = (2y − 1) z, 1 − p_t = 1/(1 + e^t)
    t = v * (2 * y - 1)
    at = 1 if alpha is None else (alpha if y == 1 else 1 - alpha)
    return at * (1 / (1 + mpmath.exp(t))) ** gamma * mpmath.log1p(mpmath.exp(-t))


@pytest.mark.parametrize("gamma", [0.25, 0.5, 2.0])
def test_focal_binary_gradient_vs_mpmath_diff(gamma: float) -> None:
    z = np.array(GRID)
    with mpmath.workdps(50):
        for y in (0.0, 1.0):
            # mpmath.diff (50 digits) of the published formula: an independent derivative
            want = [float(mpmath.diff(lambda v: mp_focal_binary(v, y, gamma, 0.25), mpmath.mpf(x)))
                    for x in z]
            got = FB.per_example_grad(z, np.full_like(z, y), gamma=gamma, alpha=0.25)
            assert np.all(np.isfinite(got))
            assert_close(got, want, 1e-12, TINY)


def test_bce_gradient_vs_mpmath_diff() -> None:
    z = np.array(GRID)
    with mpmath.workdps(50):
        for y in (0.0, 1.0, 0.3):
            # mpmath.diff of (1 − y) log(1 + e^z) + w y log(1 + e^(−z)) (Cox 1958), w = 2
            def f(v: Any) -> Any:
                return (1 - y) * mpmath.log1p(mpmath.exp(v)) + 2 * y * mpmath.log1p(mpmath.exp(-v))

            want = [float(mpmath.diff(f, mpmath.mpf(x))) for x in z]
            assert_close(BCE.per_example_grad(z, np.full_like(z, y), pos_weight=2.0), want, 1e-13, TINY)


ROWS = np.array([[a, 0.0, -a / 3.0] for a in GRID] + [[a, a - 40.0, a + 1e-3] for a in GRID[::3]])


def mp_log_softmax(row: np.ndarray) -> list[Any]:
    # exact identity at 50 digits: ls_c = (z_c − m) − log1p(Σ_{c'≠argmax} e^(z_c' − m))
    z = [mpmath.mpf(float(v)) for v in row]
    k = int(np.argmax(row))
    l1p = mpmath.log1p(mpmath.fsum(mpmath.exp(v - z[k]) for i, v in enumerate(z) if i != k))
    return [(v - z[k]) - l1p for v in z]


def test_softmax_family_gradients_vs_mpmath_p_minus_target() -> None:
    eps = 0.2
    with mpmath.workdps(50):
        for row in ROWS:
            p = [mpmath.exp(v) for v in mp_log_softmax(row)]
            c = len(row)
            for k in range(c):
                lab = np.array([k])
                # published fact (Bridle 1990): ∇ softmax CE = p − onehot, evaluated at 50 digits;
                # p_k − 1 written as −Σ_{c≠k} p_c (same number, exact at 50 digits)
                want = [float(p[j] if j != k else -mpmath.fsum(p[i] for i in range(c) if i != k))
                        for j in range(c)]
                assert_close(CE.per_example_grad(row[None], lab)[0], want, 1e-13, TINY)
                # Szegedy et al. (CVPR 2016) target t = (1 − ε) onehot + ε/C: gradient p − t
                ws = [float(p[j] - eps / c if j != k else
                            -mpmath.fsum(p[i] for i in range(c) if i != k) + eps - mpmath.mpf(eps) / c)
                      for j in range(c)]
                assert_close(SM.per_example_grad(row[None], lab, epsilon=eps)[0], ws, 1e-12, 1e-290)
            tgt = np.array([0.5, 0.0, 0.5])
            # Kullback–Leibler gradient p − y at 50 digits
            want = [float(p[j] - mpmath.mpf(tgt[j])) for j in range(c)]
            assert_close(KL.per_example_grad(row[None], tgt[None])[0], want, 1e-12, 1e-290)


@pytest.mark.parametrize("gamma", [0.5, 2.0])
def test_focal_multiclass_gradient_vs_mpmath_diff(gamma: float) -> None:
    # 340 digits (not 50): partials down to 1e-300 must survive next to values of order 1e4
    with mpmath.workdps(340):
        for row in ROWS[::2]:
            for k in (0, 2):
                def f(*v: Any) -> Any:
                    ls = _mp_ls(v)
                    q = mpmath.fsum(mpmath.exp(ls[i]) for i in range(len(v)) if i != k)
                    return q**gamma * -ls[k]  # Lin et al. (ICCV 2017), softmax form, α = 1

                x0 = [mpmath.mpf(float(v)) for v in row]
                # mpmath.diff partial derivatives of the published formula
                orders = [tuple(int(i == j) for i in range(3)) for j in range(3)]
                want = [float(mpmath.diff(f, x0, o)) for o in orders]
                got = FM.per_example_grad(row[None], np.array([k]), gamma=gamma)[0]
                assert np.all(np.isfinite(got))
                assert_close(got, want, 1e-11, TINY)


def _mp_ls(v: tuple[Any, ...]) -> list[Any]:
    # log softmax on mpf arguments (kept symbolic for mpmath.diff): exact log1p/max-shift identity
    k = max(range(len(v)), key=lambda i: v[i])
    l1p = mpmath.log1p(mpmath.fsum(mpmath.exp(x - v[k]) for i, x in enumerate(v) if i != k))
    return [(x - v[k]) - l1p for x in v]


def test_gradients_finite_at_huge_and_largest_float64_logits() -> None:
    big = np.finfo(np.float64).max
    for a in (1e4, 1e8, big):
        zc = np.array([[a, -a, 0.0], [-a, a, 0.0], [0.0, 0.0, 0.0]])
        lab = np.array([0, 0, 1])
        for g in (0.0, 0.25, 0.5, 2.0):
            assert np.all(np.isfinite(FM.per_example_grad(zc, lab, gamma=g)))
        assert np.all(np.isfinite(CE.per_example_grad(zc, lab)))
        assert np.all(np.isfinite(SM.per_example_grad(zc, lab)))
        assert np.all(np.isfinite(KL.per_example_grad(zc, np.full((3, 3), 1 / 3))))
        zb = np.array([a, -a, a, -a])
        yb = np.array([1.0, 1.0, 0.0, 0.0])
        for g in (0.0, 0.25, 0.5, 2.0):
            assert np.all(np.isfinite(FB.per_example_grad(zb, yb, gamma=g)))
        assert np.all(np.isfinite(BCE.per_example_grad(zb, yb)))
    # limits (common practice): a saturated wrong prediction has CE gradient p − y = ±1 exactly
    assert CE.per_example_grad(np.array([[big, -big]]), np.array([1])).tolist() == [[1.0, -1.0]]
    # focal, y = 1, z → −∞: ∂ℓ/∂z → −α (recalled from memory; also the mpmath limit above)
    assert FB.per_example_grad(np.array([-big]), np.array([1.0]), gamma=0.5, alpha=0.25)[0] == -0.25


# -------------------------------------------------------------------- worked, published facts


@pytest.mark.parametrize("classes", [2, 3, 7, 1000])
def test_uniform_logits_give_log_c(classes: int) -> None:
    z = np.full((2, classes), 3.7)
    # common practice: CE of a uniform prediction is ln C (mpmath.log as the outside value)
    assert_close(CE.per_example(z, np.array([0, classes - 1])), [float(mpmath.log(classes))] * 2, 1e-15)


def test_bce_at_logit_zero_is_log_two() -> None:
    # common practice: BCE at logit 0 is ln 2 for either hard label (math.log as the outside value)
    assert_close(BCE.per_example(np.zeros(2), np.array([0.0, 1.0])), [math.log(2)] * 2, 1e-16)


def test_focal_with_gamma_zero_and_no_alpha_is_cross_entropy() -> None:
    z, y = leaf_case("focal_binary", "logits", "hard", 6.0, 1)
    # Lin et al. (ICCV 2017): γ = 0 (and α_t = 1) reduces FL to CE
    assert_close(FB.per_example(z, y, gamma=0.0, alpha=None), BCE.per_example(z, y), 1e-15)
    assert_close(FB.per_example_grad(z, y, gamma=0.0, alpha=None), BCE.per_example_grad(z, y), 1e-15)
    zc, lab = leaf_case("focal_multiclass", "logits", "labels", 6.0, 2)
    assert_close(FM.per_example(zc, lab, gamma=0.0), CE.per_example(zc, lab), 1e-15)
    assert_close(FM.per_example_grad(zc, lab, gamma=0.0), CE.per_example_grad(zc, lab), 1e-14, 1e-300)


def test_smoothing_with_epsilon_zero_is_cross_entropy() -> None:
    zc, lab = leaf_case("smoothed_ce", "logits", "labels", 6.0, 3)
    # Szegedy et al. (CVPR 2016): ε = 0 leaves the one-hot target unchanged
    assert_close(SM.per_example(zc, lab, epsilon=0.0), CE.per_example(zc, lab), 1e-15)
    assert_close(SM.per_example_grad(zc, lab, epsilon=0.0), CE.per_example_grad(zc, lab), 1e-15)


def test_softmax_ce_gradient_is_p_minus_y_and_sums_to_zero() -> None:
    zc, lab = leaf_case("categorical_ce", "logits", "labels", 4.0, 4)
    g = CE.per_example_grad(zc, lab)
    # Bridle (1990): ∇ = softmax(z) − onehot(y); scipy.special.softmax as the outside p
    assert_close(g, sp.softmax(zc, axis=-1) - np.eye(C)[lab], 1e-13, 1e-16)
    assert np.all(np.abs(g.sum(-1)) <= 4 * np.finfo(float).eps)  # rows sum to 0 (common practice)


def _ce_label0(v: jax.Array) -> jax.Array:
    return jax.nn.logsumexp(v) - v[0]


def test_softmax_ce_hessian_vs_jax_hessian() -> None:
    rng = np.random.default_rng(5)
    for z in (rng.normal(0, 2, 5), np.array([30.0, 0.0, -2.0]), np.zeros(4)):
        h = softmax_ce_hessian(z)
        with jax.enable_x64(True):
            # jax.hessian of logsumexp(z) − z_0 (the label term is linear, so any label works);
            # autodiff forms p − p² on the diagonal, exact only to ~eps absolute (common practice)
            hj = np.asarray(jax.jit(jax.hessian(_ce_label0))(jnp.asarray(z)))
        assert_close(h, hj, 1e-12, 4 * np.finfo(float).eps)
        assert np.allclose(h, h.T) and np.all(np.abs(h.sum(1)) < 1e-15)  # symmetric, rows sum to 0
        assert np.linalg.eigvalsh(h).min() > -1e-15  # PSD: CE is convex in the logits
    z = np.array([30.0, 0.0, -2.0])
    with mpmath.workdps(50):
        p = [mpmath.exp(v) for v in mp_log_softmax(z)]
        # mpmath: diag p_a (1 − p_a) = p_a Σ_{b≠a} p_b at 50 digits, off-diagonal −p_a p_b
        want = [[float(p[a] * (mpmath.fsum(p) - p[a]) if a == b else -p[a] * p[b]) for b in range(3)]
                for a in range(3)]
    assert_close(softmax_ce_hessian(z), want, 1e-13)


# --------------------------------------------------------------- the comparisons can fail


def test_meta_scaled_gradient_is_rejected_by_the_autodiff_comparison() -> None:
    z, lab = leaf_case("focal_multiclass", "logits", "labels", 3.0, 9)
    cot = np.ones(N)
    want = autodiff_vjp("focal_multiclass", z, lab, "logits", {"gamma": 2.0}, cot)
    good = FM.per_example_grad(z, lab, gamma=2.0)
    assert close(good, want, RTOL_AD, ATOL_AD)
    assert not close(good * (1 + 1e-6), want, RTOL_AD, ATOL_AD)  # a 1e-6 relative slip is caught


def test_meta_naive_log_softmax_is_rejected_by_the_mpmath_comparison() -> None:
    row = np.array([40.0, 0.0, -3.0])
    with mpmath.workdps(50):
        want = [float(-mp_log_softmax(row)[0])]
    naive = -np.log(np.exp(row[0]) / np.exp(row).sum())  # log(softmax): rounds to 0 at p ≈ 1
    assert close(CE.per_example(row[None], np.array([0])), want, 1e-13, TINY)
    assert not close([naive], want, 1e-13, TINY)


def test_meta_naive_focal_gradient_is_rejected_at_saturation() -> None:
    z, y, g = np.array([800.0]), np.array([1.0]), 0.5
    p = sp.expit(z)
    with np.errstate(all="ignore"):  # textbook chain rule with the bare (1 − p)^(γ−1) factor
        naive = -(-g * (1 - p) ** (g - 1) * p * (1 - p) * np.log(p) + (1 - p) ** g * (1 - p))
    with mpmath.workdps(50):
        want = [float(mpmath.diff(lambda v: mp_focal_binary(v, 1.0, g, None), mpmath.mpf(800)))]
    assert close(FB.per_example_grad(z, y, gamma=g, alpha=None), want, 1e-12, TINY)
    assert not close(naive, want, 1e-12, TINY)


def test_jax_twins_keep_the_derivative_at_the_kinks_of_their_stable_forms():
    """Regression: softplus written with max and |x| had autodiff 0 at x = 0; a label gathered
    after the log of probabilities gave nan where an unused p_c = 0."""
    import jax
    import jax.numpy as jnp
    from scipy.special import expit

    from lossguard.references._stable import j_softplus
    from lossguard.references.ce import ce_jax

    with jax.enable_x64(True):
        # d/dx softplus(x) = σ(x); σ(0) = 1/2 (scipy.special.expit)
        assert float(jax.grad(j_softplus)(jnp.float64(0.0))) == expit(0.0)
        p = jnp.array([[0.7, 0.3, 0.0]])
        g = jax.grad(lambda q: ce_jax(q, jnp.array([0]), inputs="probabilities").sum())(p)
        # ∂(−log p_0)/∂p = (−1/p_0, 0, 0) (common practice)
        np.testing.assert_allclose(np.asarray(g), [[-1 / 0.7, 0.0, 0.0]], rtol=1e-15)


def test_label_shortcuts_give_the_full_formulas_bit_for_bit() -> None:
    # the label paths gather before building full-size arrays and reuse the exponentials; the
    # numbers must be those of the written-out formulas: softmax = e^(x − m) / (1 + s),
    # log softmax = (x − m) − log1p(s), −log softmax(z)_y, and p − onehot(y) with p_y − 1 taken
    # as −Σ_{c≠y} p_c, whatever the memory layout of z
    from lossguard.references._stable import (_shifted, label_log_softmax, log_softmax, onehot, softmax,
                                              take_label)

    rng = np.random.default_rng(11)
    for trial in range(80):
        c = 7 if trial % 2 else 50
        z = rng.normal(0.0, 10.0 ** rng.uniform(-3, 4), (9, c))
        if trial % 3 == 0:
            z[2] = z[2, 0]  # a row of ties
        if trial % 4 == 0:
            z[0, 3] = np.inf  # special values must match too
        if trial % 5 == 0:
            z[1] = -np.inf
            z[4, 1] = np.nan
        if trial % 2 == 0:
            z = np.asfortranarray(z)  # column-major, as from some data frames
        y = rng.integers(0, c, 9).astype(np.int32 if trial % 3 == 1 else np.int64)
        with np.errstate(all="ignore"):
            _, d, s = _shifted(np.asarray(z, dtype=np.float64), -1)
            want_p, want_all = np.exp(d) / (1.0 + s), d - np.log1p(s)
            want_ls = take_label(want_all, y)
            t = onehot(y, c)
            others = np.sum(np.where(t > 0, 0.0, want_p), axis=-1, keepdims=True)
            want_g = np.where(t > 0, -others, want_p)
            got = (softmax(z), log_softmax(z), label_log_softmax(z, y), CE.per_example_grad(z, y),
                   CE.per_example(z, y))
        for g, w in zip(got, (want_p, want_all, want_ls, want_g, -want_ls)):
            assert np.ascontiguousarray(g).tobytes() == np.ascontiguousarray(w).tobytes()

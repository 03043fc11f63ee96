"""Reference loss values against outside sources: scipy, scikit-learn, optax, torch and mpmath.

Every reference value is matched by at least two independent outside sources; each check names
its source in the comment beside it. The scenario: a warehouse robot sorting parcels into C bins
(categorical), flagging fragile parcels (binary) and predicting a bin-occupancy mix (distribution).
"""

from __future__ import annotations

import jax
import jax.numpy as jnp
import mpmath
import numpy as np
import optax
import pytest
import scipy.special as sp
import scipy.stats
from sklearn.metrics import log_loss

from _closeness import assert_close, close
from lossguard.references import REFERENCES

BCE, CE, SM = REFERENCES["bce"], REFERENCES["categorical_ce"], REFERENCES["smoothed_ce"]
FB, FM, KL = REFERENCES["focal_binary"], REFERENCES["focal_multiclass"], REFERENCES["kl_divergence"]
N, C = 7, 4


@pytest.fixture
def rng() -> np.random.Generator:
    return np.random.default_rng(20240611)


def parcels(rng: np.random.Generator, scale: float = 3.0) -> tuple[np.ndarray, np.ndarray, np.ndarray]:
    """Bin logits (N, C), bin labels (N,), occupancy rows (N, C) with some exact zeros."""
    z = rng.normal(0.0, scale, (N, C))
    labels = rng.integers(0, C, N)
    rows = rng.dirichlet(np.ones(C), N)
    rows[0] = np.eye(C)[1]
    rows[1, 2] = 0.0
    rows[1] /= rows[1].sum()
    return z, labels, rows


# ------------------------------------------------------------------------------------ bce


@pytest.mark.parametrize("pos_weight", [None, 3.0])
def test_bce_logits_vs_scipy_optax_torch(rng: np.random.Generator, pos_weight: float | None) -> None:
    z = rng.normal(0, 4, (N, 3))
    y = np.where(rng.random((N, 3)) < 0.5, rng.integers(0, 2, (N, 3)), rng.random((N, 3)))
    got = BCE.per_example(z, y, pos_weight=pos_weight)
    w = 1.0 if pos_weight is None else pos_weight
    # scipy.special.log_expit: −[w y log σ(z) + (1 − y) log σ(−z)] (the published logistic loss)
    assert_close(got, -(w * y * sp.log_expit(z) + (1 - y) * sp.log_expit(-z)), 1e-13)
    torch = pytest.importorskip("torch")
    pw = None if pos_weight is None else torch.tensor(pos_weight, dtype=torch.float64)
    # torch.nn.functional.binary_cross_entropy_with_logits, elementwise, with pos_weight; it forms
    # (1 − y) z + softplus(−z), which cancels for z ≪ 0 (error ≲ few ULP of |z|: common practice)
    t = torch.nn.functional.binary_cross_entropy_with_logits(
        torch.tensor(z), torch.tensor(y), pos_weight=pw, reduction="none").numpy()
    assert_close(got, t, 1e-13, 8 * np.finfo(float).eps * (np.abs(z) + 1))
    if pos_weight is None:
        with jax.enable_x64(True):
            # optax.losses.sigmoid_binary_cross_entropy (no pos_weight there)
            o = np.asarray(optax.losses.sigmoid_binary_cross_entropy(jnp.asarray(z), jnp.asarray(y)))
        assert_close(got, o, 1e-13, 1e-16)


def test_bce_probabilities_vs_sklearn_torch_scipy(rng: np.random.Generator) -> None:
    p = rng.uniform(0.02, 0.98, 40)
    y = rng.integers(0, 2, 40).astype(float)
    got = BCE.per_example(p, y, inputs="probabilities")
    # sklearn.metrics.log_loss of binary probabilities (mean over samples)
    assert_close(got.mean(), log_loss(y, p), 1e-13)
    # scipy.special.xlogy / xlog1py: −[y log p + (1 − y) log(1 − p)]
    assert_close(got, -(sp.xlogy(y, p) + sp.xlog1py(1 - y, -p)), 1e-14)
    torch = pytest.importorskip("torch")
    soft = rng.random(40)
    # torch.nn.functional.binary_cross_entropy on soft targets
    t = torch.nn.functional.binary_cross_entropy(torch.tensor(p), torch.tensor(soft), reduction="none")
    assert_close(BCE.per_example(p, soft, inputs="probabilities"), t.numpy(), 1e-13)


def test_bce_pos_weight_on_probabilities_vs_scipy_sklearn_torch(rng: np.random.Generator) -> None:
    w = 2.5
    p = rng.uniform(0.02, 0.98, 40)
    hard = rng.integers(0, 2, 40).astype(float)
    got = BCE.per_example(p, hard, inputs="probabilities", pos_weight=w)
    # scipy.special.xlogy / xlog1py: −[w y log p + (1 − y) log(1 − p)], w on the positive term
    assert_close(got, -(w * sp.xlogy(hard, p) + sp.xlog1py(1 - hard, -p)), 1e-14)
    # sklearn.metrics.log_loss, unnormalised, with sample_weight w on positive examples: for hard
    # labels that is the positive term weighted by w
    want = log_loss(hard, p, sample_weight=np.where(hard == 1, w, 1.0), normalize=False, labels=[0, 1])
    assert_close(np.sum(got), want, 1e-12)
    torch = pytest.importorskip("torch")
    soft = rng.random(40)
    # torch.nn.functional.binary_cross_entropy_with_logits(pos_weight=w) at z = log(p / (1 − p)):
    # σ(z) = p, so it is the probabilities form with w on the positive term (soft targets)
    zt = torch.tensor(np.log(p) - np.log1p(-p))
    t = torch.nn.functional.binary_cross_entropy_with_logits(
        zt, torch.tensor(soft), pos_weight=torch.tensor(w, dtype=torch.float64), reduction="none")
    assert_close(BCE.per_example(p, soft, inputs="probabilities", pos_weight=w), t.numpy(), 1e-12)


def test_bce_probabilities_at_zero_and_one_give_the_true_infinity() -> None:
    p, y = np.array([0.0, 1.0, 0.0, 1.0]), np.array([1.0, 0.0, 0.0, 1.0])
    got = BCE.per_example(p, y, inputs="probabilities")
    # scipy.special.xlogy/xlog1py give +inf where the target has mass on a 0 probability, 0 where none
    want = -(sp.xlogy(y, p) + sp.xlog1py(1 - y, -p))
    assert np.array_equal(got, want) and np.array_equal(got, [np.inf, np.inf, 0.0, 0.0])


# ------------------------------------------------------------------------- categorical_ce


def test_categorical_ce_labels_vs_scipy_optax_torch(rng: np.random.Generator) -> None:
    z, labels, _ = parcels(rng)
    got = CE.per_example(z, labels)
    # scipy.special.log_softmax, picked at the label
    assert_close(got, -sp.log_softmax(z, axis=-1)[np.arange(N), labels], 1e-13)
    with jax.enable_x64(True):
        # optax.losses.softmax_cross_entropy_with_integer_labels
        o = optax.losses.softmax_cross_entropy_with_integer_labels(jnp.asarray(z), jnp.asarray(labels))
    assert_close(got, np.asarray(o), 1e-13)
    torch = pytest.importorskip("torch")
    # torch.nn.functional.cross_entropy, reduction="none"
    t = torch.nn.functional.cross_entropy(torch.tensor(z), torch.tensor(labels), reduction="none")
    assert_close(got, t.numpy(), 1e-13)


def test_categorical_ce_distribution_vs_optax_scipy_torch(rng: np.random.Generator) -> None:
    z, _, rows = parcels(rng)
    got = CE.per_example(z, rows)
    # scipy.special.log_softmax: −Σ y log softmax(z)
    assert_close(got, -np.sum(rows * sp.log_softmax(z, axis=-1), axis=-1), 1e-13)
    with jax.enable_x64(True):
        # optax.losses.softmax_cross_entropy with probability targets
        o = optax.losses.softmax_cross_entropy(jnp.asarray(z), jnp.asarray(rows))
    assert_close(got, np.asarray(o), 1e-13)
    torch = pytest.importorskip("torch")
    w = np.array([0.5, 2.0, 1.0, 3.0])
    # torch.nn.functional.cross_entropy with probability targets and class weights (inside the sum)
    t = torch.nn.functional.cross_entropy(torch.tensor(z), torch.tensor(rows), weight=torch.tensor(w),
                                          reduction="none")
    assert_close(CE.per_example(z, rows, weight=list(w)), t.numpy(), 1e-13)
    # scipy.special.log_softmax, weighted by hand: −Σ w_c y_c log softmax(z)_c
    assert_close(CE.per_example(z, rows, weight=list(w)),
                 -np.sum(w * rows * sp.log_softmax(z, axis=-1), axis=-1), 1e-13)


def test_categorical_ce_class_weighted_rows_vs_scipy_sklearn_torch(rng: np.random.Generator) -> None:
    z, labels, _ = parcels(rng)
    w = np.array([0.5, 2.0, 1.0, 3.0])
    # the registry's weighted rows: each example's loss times its label's weight (the weighted mean
    # divides their sum by Σ w_y)
    got = CE.example_weights(labels, weight=list(w)) * CE.per_example(z, labels, weight=list(w))
    # scipy.special.log_softmax: example i weighted by its label's weight, −w_y log softmax(z)_y
    assert_close(got, -w[labels] * sp.log_softmax(z, axis=-1)[np.arange(N), labels], 1e-13)
    # sklearn.metrics.log_loss, unnormalised, with sample_weight = w_y: Σ_i w_y ℓ_i
    want = log_loss(labels, sp.softmax(z, axis=-1), sample_weight=w[labels], normalize=False,
                    labels=list(range(C)))
    assert_close(np.sum(got), want, 1e-12)
    torch = pytest.importorskip("torch")
    # torch.nn.functional.cross_entropy(weight=w, reduction="none") gives w_y ℓ_i per row
    t = torch.nn.functional.cross_entropy(torch.tensor(z), torch.tensor(labels), weight=torch.tensor(w),
                                          reduction="none")
    assert_close(got, t.numpy(), 1e-13)


def test_categorical_ce_probabilities_vs_sklearn_scipy(rng: np.random.Generator) -> None:
    z, labels, _ = parcels(rng)
    p = sp.softmax(z, axis=-1)
    got = CE.per_example(p, labels, inputs="probabilities")
    # sklearn.metrics.log_loss (multiclass probabilities, mean over samples)
    assert_close(got.mean(), log_loss(labels, p, labels=list(range(C))), 1e-12)
    # scipy.special.xlogy: −Σ onehot log p
    assert_close(got, -np.sum(sp.xlogy(np.eye(C)[labels], p), axis=-1), 1e-13)
    w = np.array([1.0, 4.0, 0.5, 2.0])
    # sklearn.metrics.log_loss with sample_weight = w_y is the class-weighted mean Σ w_y ℓ / Σ w_y
    want = log_loss(labels, p, sample_weight=w[labels], labels=list(range(C)))
    wy = CE.example_weights(labels, weight=list(w))
    assert_close(np.sum(wy * got) / np.sum(wy), want, 1e-12)


# ---------------------------------------------------------------------------- smoothed_ce


@pytest.mark.parametrize("eps", [0.0, 0.1, 0.35])
def test_smoothed_ce_vs_optax_torch(rng: np.random.Generator, eps: float) -> None:
    z, labels, _ = parcels(rng)
    got = SM.per_example(z, labels, epsilon=eps)
    with jax.enable_x64(True):
        # optax.losses.smooth_labels then optax.losses.softmax_cross_entropy
        t = optax.losses.smooth_labels(jax.nn.one_hot(jnp.asarray(labels), C, dtype=jnp.float64), eps)
        o = optax.losses.softmax_cross_entropy(jnp.asarray(z), t)
    assert_close(got, np.asarray(o), 1e-13)
    torch = pytest.importorskip("torch")
    # torch.nn.functional.cross_entropy(label_smoothing=ε)
    tt = torch.nn.functional.cross_entropy(torch.tensor(z), torch.tensor(labels), label_smoothing=eps,
                                           reduction="none")
    assert_close(got, tt.numpy(), 1e-13)


# ---------------------------------------------------------------------------------- focal


@pytest.mark.parametrize("gamma,alpha", [(2.0, 0.25), (0.5, None), (0.0, 0.7), (3.5, 1.0)])
def test_focal_binary_vs_optax_and_formula(rng: np.random.Generator, gamma: float,
                                           alpha: float | None) -> None:
    z = rng.normal(0, 5, (N, 3))
    y = rng.integers(0, 2, (N, 3)).astype(float)
    got = FB.per_example(z, y, gamma=gamma, alpha=alpha)
    with jax.enable_x64(True):
        # optax.losses.sigmoid_focal_loss (hard labels)
        o = np.asarray(optax.losses.sigmoid_focal_loss(jnp.asarray(z), jnp.asarray(y), alpha=alpha,
                                                       gamma=gamma))
    assert_close(got, o, 1e-12, 1e-300)
    # scipy.special.expit / log_expit: Lin et al. (ICCV 2017) eq. (5), −α_t (1 − p_t)^γ log p_t
    pt = np.where(y == 1, sp.expit(z), sp.expit(-z))
    at = 1.0 if alpha is None else np.where(y == 1, alpha, 1 - alpha)
    logpt = np.where(y == 1, sp.log_expit(z), sp.log_expit(-z))
    assert_close(got, -at * (1 - pt) ** gamma * logpt, 1e-10, 1e-300)


def test_focal_binary_soft_targets_follow_the_optax_generalisation(rng: np.random.Generator) -> None:
    z, y = rng.normal(0, 3, 30), rng.random(30)
    got = FB.per_example(z, y, gamma=1.5, alpha=0.3)
    with jax.enable_x64(True):
        # optax.losses.sigmoid_focal_loss (0.2.8 accepts continuous labels, same generalisation)
        o = optax.losses.sigmoid_focal_loss(jnp.asarray(z), jnp.asarray(y), alpha=0.3, gamma=1.5)
    assert_close(got, np.asarray(o), 1e-12)


@pytest.mark.parametrize("gamma,alpha", [(2.0, None), (0.5, 0.25), (1.0, [0.1, 0.2, 0.3, 0.4])])
def test_focal_multiclass_vs_scipy_formula(rng: np.random.Generator, gamma: float,
                                           alpha: object) -> None:
    z, labels, _ = parcels(rng)
    got = FM.per_example(z, labels, gamma=gamma, alpha=alpha)
    # scipy.special.softmax / log_softmax: Lin et al. (ICCV 2017) softmax form −α_y (1 − p_y)^γ log p_y
    py = sp.softmax(z, axis=-1)[np.arange(N), labels]
    lpy = sp.log_softmax(z, axis=-1)[np.arange(N), labels]
    ay = 1.0 if alpha is None else (np.asarray(alpha)[labels] if np.ndim(alpha) else alpha)
    assert_close(got, -ay * (1 - py) ** gamma * lpy, 1e-11)


# ------------------------------------------------------------------------------------- kl


def test_kl_vs_scipy_optax_torch(rng: np.random.Generator) -> None:
    z, _, rows = parcels(rng)
    got = KL.per_example(z, rows)
    p = sp.softmax(z, axis=-1)
    # scipy.special.rel_entr summed over classes (0 · log 0 = 0 built in)
    assert_close(got, np.sum(sp.rel_entr(rows, p), axis=-1), 1e-12, 1e-15)
    # scipy.stats.entropy(y, p) is KL(y ‖ p)
    assert_close(got, scipy.stats.entropy(rows, p, axis=-1), 1e-12, 1e-15)
    with jax.enable_x64(True):
        # optax.losses.kl_divergence(log_predictions, targets)
        o = optax.losses.kl_divergence(jax.nn.log_softmax(jnp.asarray(z)), jnp.asarray(rows))
    assert_close(got, np.asarray(o), 1e-12, 1e-15)
    torch = pytest.importorskip("torch")
    # torch.nn.functional.kl_div(log_input, target) summed over classes
    t = torch.nn.functional.kl_div(torch.log_softmax(torch.tensor(z), -1), torch.tensor(rows),
                                   reduction="none").sum(-1)
    assert_close(got, t.numpy(), 1e-12, 1e-15)


# -------------------------------------------------------------- mpmath at extreme logits

GRID = [-1e4, -745.0, -700.0, -40.0, -30.0, -5.0, -1e-8, 0.0, 1e-8, 5.0, 30.0, 40.0, 700.0, 745.0, 1e4]
ROWS = np.array([[a, 0.0, -a / 3.0, 1.5] for a in GRID] + [[a, a - 40.0, a + 1e-3, a] for a in GRID])


def mp_ls(row: np.ndarray) -> list[mpmath.mpf]:
    """log softmax at 50 digits, as (z_c − m) − log1p(Σ_{c'≠argmax} e^(z_c' − m)).

    The shift by m and the log1p are exact identities; writing ls this way (rather than z − lse)
    keeps 50 significant digits even when −ls_argmax is far below 1e-50 · m.
    """
    z = [mpmath.mpf(float(v)) for v in row]
    k = int(np.argmax(row))
    l1p = mpmath.log1p(mpmath.fsum(mpmath.exp(v - z[k]) for i, v in enumerate(z) if i != k))
    return [(v - z[k]) - l1p for v in z]


# values below the smallest normal double (2^-1022 ≈ 2.2e-308, IEEE-754) lose relative precision
TINY = 1e-300


def test_bce_and_focal_binary_vs_mpmath_at_extreme_logits() -> None:
    z = np.array(GRID)
    with mpmath.workdps(50):
        for y in (0.0, 1.0, 0.3):
            # mpmath, 50 digits: (1 − y) log(1 + e^z) + y log(1 + e^(−z)) (Cox 1958 logistic loss)
            want = [float((1 - y) * mpmath.log1p(mpmath.exp(v)) + y * mpmath.log1p(mpmath.exp(-v)))
                    for v in map(mpmath.mpf, z)]
            assert_close(BCE.per_example(z, np.full_like(z, y)), want, 2e-15, TINY)
        for y in (0.0, 1.0):
            for gamma, alpha in ((2.0, 0.25), (0.5, None), (0.0, None)):
                t = [mpmath.mpf(v) * (2 * y - 1) for v in z]
                at = 1.0 if alpha is None else (alpha if y == 1 else 1 - alpha)
                # mpmath, 50 digits: Lin et al. (ICCV 2017) α_t σ(−t)^γ log(1 + e^(−t)), t = s z
                want = [float(at * (1 / (1 + mpmath.exp(v))) ** gamma * mpmath.log1p(mpmath.exp(-v)))
                        for v in t]
                got = FB.per_example(z, np.full_like(z, y), gamma=gamma, alpha=alpha)
                assert_close(got, want, 1e-13, TINY)


def test_categorical_family_vs_mpmath_at_extreme_logits() -> None:
    eps, gamma = 0.1, 0.5
    with mpmath.workdps(50):
        for row in ROWS:
            ls = mp_ls(row)
            for k in range(C):
                lab = np.array([k])
                # mpmath, 50 digits: −log softmax(z)_k
                assert_close(CE.per_example(row[None], lab), [float(-ls[k])], 1e-15, TINY)
                # mpmath, 50 digits: −Σ_c ((1 − ε)[c = k] + ε/C) log softmax_c (Szegedy et al. 2016)
                t = [(1 - eps) * (c == k) + mpmath.mpf(eps) / C for c in range(C)]
                sm = -mpmath.fsum(t[c] * ls[c] for c in range(C))
                assert_close(SM.per_example(row[None], lab, epsilon=eps), [float(sm)], 1e-14, TINY)
                # mpmath, 50 digits: (Σ_{c≠k} p_c)^γ (−log p_k) (Lin et al. 2017, softmax form)
                q = mpmath.fsum(mpmath.exp(ls[c]) for c in range(C) if c != k)
                fm = q**gamma * -ls[k]
                assert_close(FM.per_example(row[None], lab, gamma=gamma), [float(fm)], 1e-13, TINY)


def test_kl_vs_mpmath_at_extreme_logits() -> None:
    target = np.array([0.25, 0.0, 0.5, 0.25])
    with mpmath.workdps(50):
        for row in ROWS:
            ls = mp_ls(row)
            # mpmath, 50 digits: Σ y_c (log y_c − log softmax_c), 0 · log 0 = 0 (Kullback–Leibler 1951)
            want = mpmath.fsum(t * (mpmath.log(t) - ls[c]) for c, t in enumerate(target) if t > 0)
            assert_close(KL.per_example(row[None], target[None]), [float(want)], 1e-14, TINY)


def test_values_at_the_largest_float64() -> None:
    big = np.finfo(np.float64).max
    z = np.array([[big, -big, 0.0]])
    with mpmath.workdps(50):
        ls = mp_ls(z[0])
    # mpmath, 50 digits: −log softmax_0 = log1p(e^(−2big) + e^(−big)) rounds to 0 in float64
    assert CE.per_example(z, np.array([0]))[0] == float(-ls[0]) == 0.0
    # mpmath: −log softmax_1 ≈ 2·big; IEEE-754 rounds it to +inf, the true float64 value
    assert CE.per_example(z, np.array([1]))[0] == float(-ls[1]) == np.inf
    with mpmath.workdps(50):
        # mpmath, 50 digits: log(1 + e^(−big)) and log(1 + e^(big)) rounded to float64
        want = [float(mpmath.log1p(mpmath.exp(-mpmath.mpf(big)))),
                float(mpmath.log1p(mpmath.exp(mpmath.mpf(big))))]
    assert_close(BCE.per_example(np.array([big, -big]), np.array([1.0, 1.0])), want, 0.0)
    got = FB.per_example(np.array([big, -big]), np.array([0.0, 1.0]), gamma=0.5, alpha=None)
    assert np.array_equal(got, [big, big])  # (1 − p_t)^γ = 1 there, so ℓ = softplus(big) = big

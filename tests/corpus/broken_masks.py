"""Broken losses: the ignore label (padded examples) and masked classes (−inf logits).

Shapes: logits ``z`` (N, C), labels ``y`` (N,) where ``IGNORE`` marks an example to leave out;
distribution targets ``y`` (N, C). A correct masked mean is Σ_kept ℓ_i / #kept, with ignored
rows contributing neither value nor gradient whatever their logits hold; a class whose logit is
−inf (it cannot occur) has probability exactly 0 and must leave value and gradient finite.
"""

from __future__ import annotations

import jax
import jax.numpy as jnp

from ._entry import broken

F = "masks"
IGNORE = -100


def _pick(a: jax.Array, y: jax.Array) -> jax.Array:
    """a[i, y_i] for each row i."""
    return jnp.take_along_axis(a, y[:, None], axis=-1)[:, 0]


@broken(F, ("finite", "padding"), "indexes log-probabilities with the raw ignore label (JAX fills an "
        "out-of-range gather with nan) and then multiplies by the mask: nan · 0 = nan",
        kind="categorical", reference="categorical_ce", ignore_label=IGNORE)
def unsanitised_index(z: jax.Array, y: jax.Array) -> jax.Array:
    valid = (y != IGNORE).astype(z.dtype)
    nll = -_pick(jax.nn.log_softmax(z, axis=-1), y)
    return jnp.sum(nll * valid) / jnp.sum(valid)


@broken(F, "padding", "maps the ignore label to class 0 so the index is legal, then forgets to mask: "
        "ignored examples are scored as class 0", kind="categorical", reference="categorical_ce",
        ignore_label=IGNORE)
def ignored_scored_as_class0(z: jax.Array, y: jax.Array) -> jax.Array:
    safe = jnp.where(y == IGNORE, 0, y)
    return -jnp.mean(_pick(jax.nn.log_softmax(z, axis=-1), safe))


@broken(F, "padding", "masked sum divided by the batch size N instead of the number of kept examples: "
        "padding a batch with ignored examples shrinks the loss", kind="categorical",
        reference="categorical_ce", ignore_label=IGNORE)
def mean_over_padded_batch(z: jax.Array, y: jax.Array) -> jax.Array:
    valid = y != IGNORE
    nll = -_pick(jax.nn.log_softmax(z, axis=-1), jnp.where(valid, y, 0))
    return jnp.sum(jnp.where(valid, nll, 0.0)) / y.shape[0]


@broken(F, "padding", "label smoothing whose uniform term ε·mean_c(-log p) is summed over every row, "
        "ignored ones included", kind="categorical", ignore_label=IGNORE, params={"epsilon": 0.1})
def smoothing_term_on_ignored_rows(z: jax.Array, y: jax.Array, epsilon: float) -> jax.Array:
    keep = y != IGNORE
    logp = jax.nn.log_softmax(z, axis=-1)
    nll = -_pick(logp, jnp.where(keep, y, 0))
    hard = jnp.where(keep, (1.0 - epsilon) * nll, 0.0)
    uniform = -epsilon * jnp.mean(logp, axis=-1)  # the bug: not masked
    return jnp.sum((hard + uniform) / jnp.sum(keep))


@jax.custom_vjp
def _masked_ce(z: jax.Array, y: jax.Array) -> jax.Array:
    valid = y != IGNORE
    nll = -_pick(jax.nn.log_softmax(z, axis=-1), jnp.where(valid, y, 0))
    return jnp.sum(jnp.where(valid, nll, 0.0)) / jnp.sum(valid)


def _masked_ce_fwd(z: jax.Array, y: jax.Array) -> tuple[jax.Array, tuple[jax.Array, jax.Array]]:
    return _masked_ce(z, y), (z, y)


def _masked_ce_bwd_leaky(res: tuple[jax.Array, jax.Array], g: jax.Array) -> tuple[jax.Array, None]:
    z, y = res
    valid = y != IGNORE
    p = jax.nn.softmax(z, axis=-1)
    onehot = jax.nn.one_hot(jnp.where(valid, y, 0), z.shape[-1], dtype=z.dtype)
    # ∂ℓ/∂z = (p − onehot)/#valid for kept rows; the bug: the mask is missing, ignored rows get it too
    return g * (p - onehot) / jnp.sum(valid), None


_masked_ce.defvjp(_masked_ce_fwd, _masked_ce_bwd_leaky)


@broken(F, ("padding", "gradient"), "custom_vjp whose forward pass masks ignored examples but whose "
        "backward pass does not: ignored rows receive a gradient the value does not have",
        kind="categorical", reference="categorical_ce", ignore_label=IGNORE)
def custom_vjp_mask_leak(z: jax.Array, y: jax.Array) -> jax.Array:
    return _masked_ce(z, y)


@broken(F, "padding", "ignore label hard-coded as -1 (another codebase's convention) while the data "
        "uses -100: one_hot(-100) is a zero row so the value drops out, but the count still includes it",
        kind="categorical", reference="categorical_ce", ignore_label=IGNORE)
def wrong_ignore_convention(z: jax.Array, y: jax.Array) -> jax.Array:
    valid = (y != -1).astype(z.dtype)
    onehot = jax.nn.one_hot(y, z.shape[-1], dtype=z.dtype)  # all zeros for any label outside [0, C)
    nll = -jnp.sum(onehot * jax.nn.log_softmax(z, axis=-1), axis=-1)
    return jnp.sum(nll * valid) / jnp.sum(valid)


@broken(F, "masking", "soft-target cross-entropy -Σ y·log p: a masked class (logit -inf, target 0) "
        "gives 0 · (-inf) = nan", kind="distribution", reference="categorical_ce")
def soft_targets_times_masked_log(z: jax.Array, y: jax.Array) -> jax.Array:
    return -jnp.mean(jnp.sum(y * jax.nn.log_softmax(z, axis=-1), axis=-1))


@broken(F, "masking", "confidence penalty Σ p·log p taken from log_softmax: stable for finite logits, "
        "but a masked class has p = 0 and log p = -inf, and 0 · (-inf) = nan",
        kind="categorical", params={"beta": 0.1})
def entropy_penalty_on_masked_class(z: jax.Array, y: jax.Array, beta: float) -> jax.Array:
    logp = jax.nn.log_softmax(z, axis=-1)
    neg_entropy = jnp.sum(jnp.exp(logp) * logp, axis=-1)
    return jnp.mean(-_pick(logp, y) + beta * neg_entropy)


@broken(F, "masking", "logits centred by their row mean before a max-free softmax ('centring keeps "
        "exp in range'): one -inf logit makes the mean -inf and every entry nan",
        kind="categorical", reference="categorical_ce")
def row_mean_centring(z: jax.Array, y: jax.Array) -> jax.Array:
    s = z - jnp.mean(z, axis=-1, keepdims=True)
    lse = jnp.log(jnp.sum(jnp.exp(s), axis=-1))
    return jnp.mean(lse - _pick(s, y))


@broken(F, "masking", "target logit picked by a one-hot dot product Σ onehot·z: a masked class "
        "(logit -inf) gives 0 · (-inf) = nan", kind="categorical", reference="categorical_ce")
def onehot_dot_picks_target(z: jax.Array, y: jax.Array) -> jax.Array:
    onehot = jax.nn.one_hot(y, z.shape[-1], dtype=z.dtype)
    return jnp.mean(jax.nn.logsumexp(z, axis=-1) - jnp.sum(onehot * z, axis=-1))

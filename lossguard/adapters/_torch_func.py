"""The torch adapter's operations on all cases at once, with ``torch.func.vmap``.

Notation: a stack of K cases z (K, *S), targets y (K, *T), cotangents c (K, *O) (O the output
shape of one case), directions v (K, *S); f the loss on one case, φ(z) = ⟨c, f(z)⟩.

    value   vmap(f)
    vg      vmap(grad_and_value(φ)): the VJP of c, with f(z) as auxiliary output
    jvp     vmap(jvp(f)): forward mode, (f(z), ∂f(z)[v])
    hvp     vmap(grad(∇φ · v)): reverse over reverse, (∇φ, H v)

Any failure propagates: the adapter then runs the operation one case at a time.

References:
    Pearlmutter, B. A., "Fast exact multiplication by the Hessian", Neural Computation 6(1), 1994.
"""

from __future__ import annotations

from collections.abc import Callable
from typing import Any

__all__ = ["batched_op"]


def batched_op(op: str, f: Callable[[Any, Any], Any], ts: list[Any]) -> tuple[Any, ...]:
    """``op`` of ``f`` on stacked tensors ``ts`` = [z, y, *extra]; returns stacked tensors."""
    import torch
    from torch.func import grad, grad_and_value, jvp, vmap

    def phi(z: Any, y: Any, c: Any) -> tuple[Any, Any]:
        out = f(z, y)
        return torch.sum(out * c.to(out.dtype).reshape(out.shape)), out  # ⟨c, f(z)⟩: its gradient is the VJP

    if op == "value":
        with torch.no_grad():
            return (vmap(f)(*ts),)
    if op == "vg":
        g, (_, out) = vmap(grad_and_value(phi, has_aux=True))(*ts)
        return out, g
    if op == "jvp":
        def one(z: Any, y: Any, v: Any) -> Any:
            return jvp(lambda zz: f(zz, y), (z,), (v.to(z.dtype),))

        return tuple(vmap(one)(*ts))

    def slope(z: Any, y: Any, c: Any, v: Any) -> tuple[Any, Any]:
        g = grad(lambda zz: phi(zz, y, c)[0])(z)
        return torch.sum(g * v.to(g.dtype)), g

    hv, g = vmap(grad(slope, has_aux=True))(*ts)
    return g, hv

"""The declared loss: what a loss is, stated once, validated at the top.

Notation and shapes (class axis last):

- ``binary``: predictions ``z`` of shape (N,) or (N, D), targets ``y`` of the same shape in [0, 1]
  (hard 0/1 and soft values).
- ``categorical``: predictions (N, C), integer labels (N,) in [0, C) (or the ignore label).
- ``distribution``: predictions (N, C), targets (N, C) whose rows lie on the probability simplex.

The loss is called as ``loss(predictions, targets, **params)``. Its reduction is read from the
output: a scalar is a batch mean (or a sum when ``reduction="sum"`` is declared); an output of
shape (N,) (binary: the predictions' shape) holds one value per example.
"""

from __future__ import annotations

import inspect
from collections.abc import Callable, Mapping
from dataclasses import dataclass, field, replace
from typing import Any

from ._range import DEFAULT_MAX_LOGIT, describe_max_logit, parse_dtypes, parse_max_logit
from ._suggest import bad_value, did_you_mean
from .errors import SpecError
from .tolerance import DTYPES

__all__ = ["KINDS", "INPUTS", "REDUCTIONS", "AUTOCAST_DTYPES", "LossSpec", "declare"]

KINDS = ("binary", "categorical", "distribution")
INPUTS = ("logits", "probabilities")
REDUCTIONS = ("mean", "sum")
#: dtypes a torch loss may declare it runs under CPU autocast to
AUTOCAST_DTYPES = ("bfloat16", "float16")


@dataclass(frozen=True)
class LossSpec:
    """A validated declaration of a loss. Build it with :func:`declare`.

    Attributes mirror :func:`declare`'s arguments; ``params`` is a plain dict.
    """

    loss: Callable[..., Any]
    kind: str
    inputs: str = "logits"
    params: Mapping[str, Any] = field(default_factory=dict)
    reference: str | None = None
    ignore_label: int | None = None
    grad: Callable[..., Any] | None = None
    classes: int | None = None
    reduction: str = "mean"
    skip: tuple[str, ...] = ()
    expect: tuple[str, ...] = ()
    name: str = ""
    #: the operating range: dtypes the loss is used in, and the largest |logit| it must handle
    dtypes: tuple[str, ...] = DTYPES
    max_logit: float = DEFAULT_MAX_LOGIT
    train: bool = False
    autocast: str | None = None

    @property
    def softmax_type(self) -> bool:
        """True for kinds whose predictions are one row of class scores per example."""
        return self.kind in ("categorical", "distribution")

    def with_loss(self, loss: Callable[..., Any], name: str = "") -> LossSpec:
        """The same declaration for another implementation (used by ``compare``)."""
        return replace(self, loss=loss, name=name or _callable_name(loss), grad=None)

    def describe(self) -> dict[str, Any]:
        """A JSON-ready summary (callables by name)."""
        return {
            "name": self.name,
            "kind": self.kind,
            "inputs": self.inputs,
            "params": {k: _jsonable(v) for k, v in self.params.items()},
            "reference": self.reference,
            "ignore_label": self.ignore_label,
            "grad": _callable_name(self.grad) if self.grad is not None else None,
            "classes": self.classes,
            "reduction": self.reduction,
            "skip": list(self.skip),
            "expect": list(self.expect),
            "dtypes": list(self.dtypes),
            "max_logit": describe_max_logit(self.max_logit),
            "train": self.train,
            "autocast": self.autocast,
        }


def _jsonable(v: Any) -> Any:
    if isinstance(v, (list, tuple)):
        return [_jsonable(x) for x in v]
    if isinstance(v, (int, float, str, bool)) or v is None:
        return v
    try:
        return float(v)
    except (TypeError, ValueError):
        return repr(v)


def _callable_name(fn: Any) -> str:
    mod = getattr(fn, "__module__", None) or ""
    name = getattr(fn, "__qualname__", None) or getattr(fn, "__name__", None) or repr(fn)
    return f"{mod}:{name}" if mod else str(name)


def _check_signature(fn: Callable[..., Any], what: str, params: Mapping[str, Any], shown: str = "") -> None:
    try:
        sig = inspect.signature(fn)
    except (TypeError, ValueError):
        return  # builtins and some C callables have no signature; the probe call decides
    # a class (a torch nn.Module class) is built with the params and then called with two tensors
    positional = () if inspect.isclass(fn) else (object(), object())
    try:
        sig.bind(*positional, **params)
    except TypeError as exc:
        raise SpecError(
            bad_value(
                what,
                shown or _callable_name(fn),
                f"a callable f(predictions, targets, **params) accepting params {sorted(params)}",
                f"check its signature ({exc}); try def f(predictions, targets, **params)",
            )
        ) from None


def _check_classes(kind: str, ignore_label: int | None, classes: int | None, params: Mapping[str, Any]) -> int | None:
    """Validate the ignore label and the class count; return the class count, read from a
    per-class parameter (a list of one value per class) when not given."""
    if ignore_label is not None:
        if kind != "categorical":
            raise SpecError(
                bad_value("ignore_label", ignore_label, "no ignore label for kind=" + repr(kind),
                          "declare kind='categorical' or drop the ignore label")
            )
        if isinstance(ignore_label, bool) or not isinstance(ignore_label, int):
            raise SpecError(bad_value("ignore_label", ignore_label, "an integer", "try -100"))
    if classes is not None:
        if isinstance(classes, bool) or not isinstance(classes, int) or classes < 2:
            raise SpecError(bad_value("classes", classes, "an integer >= 2", "try classes=10"))
        if kind == "binary":
            raise SpecError(bad_value("classes", classes, "no class count for kind='binary'",
                                      "drop it, or declare kind='categorical'"))
        if ignore_label is not None and 0 <= ignore_label < classes:
            raise SpecError(bad_value("ignore_label", ignore_label, f"a label outside [0, {classes})",
                                      "try -100"))
    if classes is None and kind != "binary":
        # a per-class parameter (a list of one value per class) fixes the class count
        lengths = {len(v) for v in params.values() if isinstance(v, (list, tuple))}
        if len(lengths) == 1 and min(lengths) >= 2:
            classes = lengths.pop()
    return classes


def declare(
    loss: Callable[..., Any],
    *,
    kind: str,
    inputs: str = "logits",
    params: Mapping[str, Any] | None = None,
    reference: str | None = None,
    ignore_label: int | None = None,
    grad: Callable[..., Any] | None = None,
    classes: int | None = None,
    reduction: str = "mean",
    skip: tuple[str, ...] | list[str] = (),
    expect: tuple[str, ...] | list[str] = (),
    name: str | None = None,
    dtypes: str | tuple[str, ...] | list[str] = DTYPES,
    max_logit: float | str = DEFAULT_MAX_LOGIT,
    train: bool = False,
    autocast: str | None = None,
) -> LossSpec:
    """Declare what a loss is, so that a battery of checks can be run against it.

    Args:
        loss: ``loss(predictions, targets, **params)`` returning a scalar or per-example values;
            or a torch ``nn.Module`` class, built as ``loss(**params)`` and then called.
        kind: ``"binary"``, ``"categorical"`` or ``"distribution"`` (shapes in the module doc).
        inputs: ``"logits"`` (default) or ``"probabilities"``.
        params: keyword parameters passed to the loss (and to the reference, if any).
        reference: name of a registry loss it must equal (``lossguard references`` lists them).
        ignore_label: categorical only: the label meaning "leave this example out".
        grad: closed-form gradient ``grad(predictions, targets, **params)`` of the (reduced)
            output with respect to the predictions, for losses JAX cannot trace.
        classes: fix the class count C (needed by per-class parameters).
        reduction: how a scalar output was reduced: ``"mean"`` (default) or ``"sum"``.
        skip: default checks to turn off. expect: optional checks to turn on.
        name: display name (defaults to ``module:function``).
        dtypes: the precisions the loss is used in (default all four; ``"float32,float64"`` for
            a loss never run in 16 bits). Others are not judged.
        max_logit: the largest |logit| the loss must handle (default 1e3, common practice; see
            :mod:`lossguard._range`), or ``"full"`` for the whole format. Beyond it the checks
            report what they see as information, not as failures.
        train: torch modules only: judge the module in train mode (default: eval mode).
        autocast: torch losses only: the loss runs under CPU autocast to this dtype
            (``"bfloat16"`` or ``"float16"``); float32 inputs are then judged at its rounding.

    Returns:
        A frozen :class:`LossSpec`.

    Example:
        >>> import jax
        >>> spec = declare(lambda z, y: -jax.nn.log_softmax(z)[jax.numpy.arange(len(y)), y].mean(),
        ...                kind="categorical", reference="categorical_ce")
        >>> spec.kind
        'categorical'
    """
    if not callable(loss):
        raise SpecError(
            bad_value("loss", loss, "a callable loss(predictions, targets, **params)",
                      "pass the function itself, not its result")
        )
    if kind not in KINDS:
        raise SpecError(bad_value("kind", kind, "one of " + ", ".join(KINDS), did_you_mean(kind, KINDS)))
    if inputs not in INPUTS:
        raise SpecError(bad_value("inputs", inputs, "logits or probabilities", did_you_mean(inputs, INPUTS)))
    if reduction not in REDUCTIONS:
        raise SpecError(
            bad_value("reduction", reduction, "mean or sum", did_you_mean(reduction, REDUCTIONS))
        )
    dtypes = parse_dtypes(dtypes)
    max_logit = parse_max_logit(max_logit)
    params = dict(params or {})
    for key in params:
        if not isinstance(key, str) or not key.isidentifier():
            raise SpecError(bad_value("params", key, "keys that are Python identifiers", "try passing gamma=2.0"))
    classes = _check_classes(kind, ignore_label, classes, params)
    if grad is not None and not callable(grad):
        raise SpecError(bad_value("grad", grad, "a callable grad(predictions, targets, **params)",
                                  "pass the function itself"))
    if not isinstance(train, bool):
        raise SpecError(bad_value("train", train, "True or False", "try train=True for a module in train mode"))
    if autocast is not None and autocast not in AUTOCAST_DTYPES:
        raise SpecError(bad_value("autocast", autocast, "bfloat16 or float16",
                                  did_you_mean(str(autocast), AUTOCAST_DTYPES)))
    _check_signature(loss, "loss", params, name or "")
    if grad is not None:
        _check_signature(grad, "grad", params)
    if reference is not None:
        from .references import get_reference, validate_params

        ref = get_reference(reference)
        if kind not in ref.kinds:
            raise SpecError(bad_value("reference", reference, f"a reference defined for kind={kind!r}",
                                      "pick one listed by `lossguard references` for this kind"))
        if inputs not in ref.inputs:
            raise SpecError(bad_value("reference", reference, f"a reference accepting inputs={inputs!r}",
                                      "pick one listed by `lossguard references` for these inputs"))
        validate_params(ref, params, classes)
    return LossSpec(
        loss=loss,
        kind=kind,
        inputs=inputs,
        params=params,
        reference=reference,
        ignore_label=ignore_label,
        grad=grad,
        classes=classes,
        reduction=reduction,
        skip=tuple(skip),
        expect=tuple(expect),
        name=name or _callable_name(loss),
        dtypes=dtypes,
        max_logit=max_logit,
        train=train,
        autocast=autocast,
    )

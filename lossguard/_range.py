"""The operating range a loss is declared for: the dtypes it runs in, and the largest |logit|.

A practitioner states where the loss is used — ``dtypes=("float32", "float64")`` for a loss
that never runs in 16 bits, ``max_logit=1e3`` for the largest logit magnitude it must handle —
and the checks judge inside that range only. Beyond it they still probe and report, as
information on the passing line ("finite up to |z| = 1e+03 in float16; beyond, first at
|z| = 6.6e+04: value is inf").

Notation: a case's *reach* is its largest |logit| (predictions in logits). Probability inputs
have no logit magnitude: the whole of [0, 1] is inside the range (a sigmoid output reaches
exactly 0 or 1 in float32 at |z| ≈ 104, well inside any practical range).

Default: :data:`DEFAULT_MAX_LOGIT` = 1e3. Common practice, recalled rather than measured: the
logits of trained classifiers stay within a few hundred (weight decay, label smoothing, logit
soft-capping at 30–50 and z-losses in large-model training all keep them there), so 1e3 leaves a
margin while the format's far end (65504 in float16, 3.4e38 in float32, 1.8e308 in float64) is
left as information. ``max_logit="full"`` (the command line's ``--max-logit full``) judges the
whole format.

Example:
    >>> parse_max_logit("full"), parse_max_logit("1e3"), parse_dtypes("float32,float64")
    (inf, 1000.0, ('float32', 'float64'))
"""

from __future__ import annotations

import math
from collections.abc import Iterable
from dataclasses import dataclass, field
from typing import Any

import numpy as np

from ._suggest import bad_value, did_you_mean
from .errors import SpecError
from .tolerance import DTYPES

__all__ = ["split_rungs", "DEFAULT_MAX_LOGIT", "parse_max_logit", "parse_dtypes", "describe_max_logit", "case_reach",
           "Beyond", "judged_dtypes"]

#: The largest |logit| a loss must handle unless declared otherwise (common practice; see above).
DEFAULT_MAX_LOGIT = 1e3


def parse_max_logit(value: Any) -> float:
    """``"full"`` (or ``inf``) → inf; a positive number (or its text) → that float.

    Raises:
        SpecError: anything else, in the house form "max_logit=…: expected …; try …".
    """
    if isinstance(value, str) and value.strip().lower() == "full":
        return math.inf
    try:
        out = float(value)
    except (TypeError, ValueError):
        out = math.nan
    if isinstance(value, bool) or not out > 0:
        raise SpecError(bad_value("max_logit", value, "a positive number or 'full'",
                                  f"try max_logit={DEFAULT_MAX_LOGIT:g} (the default) or max_logit='full'"))
    return out


def parse_dtypes(value: Any) -> tuple[str, ...]:
    """``"float32,float64"`` or an iterable of names → the names in :data:`DTYPES` order.

    Raises:
        SpecError: an empty list or an unknown name.
    """
    names = [s.strip() for s in value.split(",")] if isinstance(value, str) else list(value or ())
    names = [n for n in names if n]
    for n in names:
        if n not in DTYPES:
            raise SpecError(bad_value("dtypes", n, "names from " + ", ".join(DTYPES), did_you_mean(str(n), DTYPES)))
    if not names:
        raise SpecError(bad_value("dtypes", value, "at least one of " + ", ".join(DTYPES),
                                  "try dtypes='float32,float64'"))
    return tuple(d for d in DTYPES if d in names)


def describe_max_logit(max_logit: float) -> str:
    """``1e+03`` or ``full`` (for reports and the JSON declaration)."""
    return "full" if math.isinf(max_logit) else f"{max_logit:g}"


def judged_dtypes(declared: Iterable[str], wanted: Iterable[str]) -> tuple[str, ...]:
    """The dtypes of ``wanted`` that the loss is declared for, in ``wanted``'s order."""
    keep = set(declared)
    return tuple(d for d in wanted if d in keep)


def split_rungs(mags: np.ndarray, max_logit: float) -> tuple[np.ndarray, np.ndarray]:
    """Ladder magnitudes inside (≤ ``max_logit``) and beyond the declared range."""
    mags = np.asarray(mags, dtype=np.float64)
    return mags[mags <= max_logit], mags[mags > max_logit]


def case_reach(inputs: str, predictions: np.ndarray) -> np.ndarray:
    """Per case (axis 0): the largest |logit|; 0 for probability inputs (always in range).

    Non-finite logits (−inf on masked classes) do not count: a mask is not a magnitude.
    """
    k = predictions.shape[0]
    if inputs == "probabilities":
        return np.zeros(k)
    flat = np.asarray(predictions, dtype=np.float64).reshape(k, -1)
    with np.errstate(invalid="ignore"):
        mag = np.where(np.isfinite(flat), np.abs(flat), 0.0)
    return mag.max(axis=1) if flat.shape[1] else np.zeros(k)


@dataclass
class Beyond:
    """What a check saw past the declared |logit|, per dtype, as information (never a failure).

    ``add`` takes each stack's per-case reach, whether each case broke, and a cause per broken
    case; ``line`` writes "finite up to |z| = X in d; beyond, first at |z| = Y: cause".
    """

    max_logit: float
    #: per dtype: (smallest reach that broke, its cause, largest reach below it that held)
    first: dict[str, tuple[float, str]] = field(default_factory=dict)
    held: dict[str, list[float]] = field(default_factory=dict)
    #: per dtype: the smallest reach that broke anywhere, inside the range included
    lowest: dict[str, float] = field(default_factory=dict)
    cases: int = 0

    def inside(self, reach: np.ndarray) -> np.ndarray:
        """Per case: within the declared range (|z| ≤ max_logit)."""
        return np.asarray(reach) <= self.max_logit

    def add(self, dtype: str, reach: np.ndarray, broke: np.ndarray, causes: list[str] | None = None) -> None:
        reach, broke = np.asarray(reach, dtype=np.float64), np.asarray(broke, bool)
        out = ~self.inside(reach)
        self.cases += int(out.sum())
        self.held.setdefault(dtype, []).extend(reach[~broke].tolist())
        if broke.any():
            self.lowest[dtype] = min(self.lowest.get(dtype, np.inf), float(reach[broke].min()))
        idx = np.flatnonzero(out & broke)
        if idx.size:
            j = int(idx[np.argmin(reach[idx])])
            cause = causes[j] if causes else "broke"
            if dtype not in self.first or reach[j] < self.first[dtype][0]:
                self.first[dtype] = (float(reach[j]), cause)

    def lines(self, what: str = "finite") -> list[str]:
        """One phrase per dtype that broke beyond the range (none when nothing did)."""
        out = []
        for dtype, (y, cause) in self.first.items():
            if self.lowest.get(dtype, y) < y:  # it broke inside the range already: no "up to"
                out.append(f"in {dtype} beyond the range, first at |z| = {y:.3g}: {cause}")
                continue
            below = [r for r in self.held.get(dtype, []) if r < y]
            x = max(below) if below else self.max_logit
            out.append(f"{what} up to |z| = {x:.3g} in {dtype}; beyond, first at |z| = {y:.3g}: {cause}")
        return out

    def note(self, what: str = "finite") -> str:
        """The information clause for a summary ("" when nothing was tried or nothing broke)."""
        if not self.cases:
            return ""
        lines = self.lines(what)
        head = f"beyond the declared |z| ≤ {describe_max_logit(self.max_logit)} (information, not judged): "
        if not lines:
            return head + f"{self.cases} cases tried, none broke"
        return head + "; ".join(lines)

    def to_dict(self) -> dict[str, Any]:
        return {"max_logit": describe_max_logit(self.max_logit), "cases": self.cases,
                "first_beyond": {d: {"abs_logit": y, "cause": c} for d, (y, c) in self.first.items()}}

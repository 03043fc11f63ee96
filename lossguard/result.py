"""The structured result of a battery: per check a verdict, the allowance, and the worst cases.

Reporting (text, JSON, markdown) reads these objects and nothing else.
"""

from __future__ import annotations

from dataclasses import asdict, dataclass, field
from typing import Any

import numpy as np

__all__ = ["Example", "CheckResult", "RunRecord", "Result", "VERDICTS", "CAUTION"]

#: Said by every output: what a pass does and does not establish.
CAUTION = "a pass is evidence from the inputs tried, not proof"

#: pass: held on every case; fail: a property broke; skip: did not apply or was turned off;
#: error: the loss could not be evaluated for this check (it raised, or has no gradient).
VERDICTS = ("pass", "fail", "skip", "error")


def _plain(a: Any) -> Any:
    if isinstance(a, np.ndarray):
        return a.tolist()
    if isinstance(a, (np.floating, np.integer)):
        return a.item()
    return a


@dataclass
class Example:
    """One failing (or worst) case, with its inputs and both values.

    Args:
        what: what was compared ("value", "gradient", "gradient along a random direction" …).
        predictions: the predictions of the case (as float64 lists in reports).
        targets: its targets.
        got: what the loss produced.
        expected: what it should have produced (reference, other oracle, or the invariant value).
        abs_err / rel_err: |got − expected| and that over |expected| (worst element).
        allowance: the allowed absolute error for this case.
        note: where the case came from ("ladder wrong |z|=1e4"), or what it shows.
        replay: a copy-pasteable call that reproduces it.
        dtype: the dtype the case was evaluated in.
    """

    what: str
    predictions: Any
    targets: Any
    got: Any
    expected: Any
    abs_err: float = float("nan")
    rel_err: float = float("nan")
    allowance: float = float("nan")
    note: str = ""
    replay: str = ""
    dtype: str = "float64"

    def to_dict(self) -> dict[str, Any]:
        return {k: _plain(v) for k, v in asdict(self).items()}


@dataclass
class CheckResult:
    """The verdict of one check.

    Args:
        name: the check's name (part of the command contract).
        verdict: one of :data:`VERDICTS`.
        summary: one line: what was checked and what happened.
        cases: how many cases were tried.
        failed: how many of them failed.
        allowance: the tolerance rule in words (from the error model).
        worst: up to a few failing (or, on a pass, the closest-to-failing) examples.
        hint: for a failure, which assumption broke and when skipping is legitimate.
        details: check-specific figures (observed Taylor order, max errors, …), JSON-ready.
        seconds: wall time of the check.
        smallest: the smallest failing input found from the worst case (rows and classes
            removed while the failure holds; :mod:`lossguard._shrink`), shown beside it.
    """

    name: str
    verdict: str
    summary: str
    cases: int = 0
    failed: int = 0
    allowance: str = ""
    worst: list[Example] = field(default_factory=list)
    hint: str = ""
    details: dict[str, Any] = field(default_factory=dict)
    seconds: float = 0.0
    smallest: Example | None = None

    @property
    def ok(self) -> bool:
        return self.verdict in ("pass", "skip")

    def to_dict(self) -> dict[str, Any]:
        d = {k: v for k, v in asdict(self).items() if k not in ("worst", "smallest")}
        d["details"] = {k: _plain(v) for k, v in self.details.items()}
        d["worst"] = [w.to_dict() for w in self.worst]
        d["smallest"] = self.smallest.to_dict() if self.smallest is not None else None
        return d


@dataclass(kw_only=True)
class RunRecord:
    """What every run of the engine records beside its verdicts (a battery's :class:`Result`, a
    :class:`~lossguard.compare.Comparison`): the declaration, seed and effort, the versions of
    what ran, how the loss was evaluated, the wall time and the number of loss evaluations.

    A subclass names its verdicts in :meth:`_verdicts`; ``ok`` and ``exit_code`` read them.
    """

    spec: dict[str, Any]
    seed: int
    effort: str
    evaluation: dict[str, Any] = field(default_factory=dict)
    versions: dict[str, str] = field(default_factory=dict)
    seconds: float = 0.0
    loss_evaluations: int = 0

    def _verdicts(self) -> list[CheckResult]:
        """The verdicts of this run."""
        raise NotImplementedError

    @property
    def ok(self) -> bool:
        """True when no part failed or errored."""
        return all(c.ok for c in self._verdicts())

    @property
    def exit_code(self) -> int:
        """0 when every part passed (or was skipped), 1 otherwise (2, bad input, is the caller's)."""
        return 0 if self.ok else 1

    def _record(self) -> dict[str, Any]:
        """The shared fields, in the order the JSON documents list them."""
        return {"spec": self.spec, "seed": self.seed, "effort": self.effort, "versions": self.versions,
                "evaluation": self.evaluation, "seconds": self.seconds, "loss_evaluations": self.loss_evaluations}


@dataclass(kw_only=True)
class Result(RunRecord):
    """Everything a battery produced for one declared loss: one :class:`CheckResult` per check."""

    target: str
    checks: list[CheckResult]

    def _verdicts(self) -> list[CheckResult]:
        return self.checks

    def check(self, name: str) -> CheckResult:
        for c in self.checks:
            if c.name == name:
                return c
        raise KeyError(name)

    def to_dict(self) -> dict[str, Any]:
        return {"target": self.target, **self._record(), "ok": self.ok, "caution": CAUTION,
                "checks": [c.to_dict() for c in self.checks]}

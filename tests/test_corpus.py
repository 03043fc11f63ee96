"""The corpus test: every broken loss fails the check meant for it; every correct one passes.

Default suite (fast): each broken loss runs only its own check(s) at effort "quick"; the correct
losses of :data:`EVERYDAY_CORRECT` run the whole default battery (plus what they declare with
``expect``) at effort "quick". Under ``-m slow``: the other correct losses at "quick", and every
entry at the default effort.

Known gaps of a check (a broken loss its meant check misses) and known false alarms (a correct
loss a check flags) are listed in ``tests/corpus/known.py``, each reported to the check's owner;
a gap is asserted to still be a gap, so its fix shows up here.
"""

from __future__ import annotations

import pytest

import lossguard
from lossguard.checks import all_checks
from lossguard.result import Result

from corpus import BROKEN, CORRECT, KNOWN_FALSE_ALARMS, KNOWN_GAPS, Entry


def _missing(names: tuple[str, ...]) -> list[str]:
    known = all_checks()
    return [n for n in names if n not in known]


def _explain(result: Result) -> str:
    return "\n".join(f"  {c.name}: {c.verdict}: {c.summary}" for c in result.checks)


def _assert_caught(entry: Entry, effort: str) -> None:
    missing = _missing(entry.catches)
    if missing:
        pytest.skip(f"check(s) {missing} not registered in this tree")
    result = lossguard.run(entry.spec(), effort=effort, only=list(entry.catches))
    gaps = []
    for name in entry.catches:
        verdict = result.check(name).verdict
        gap = KNOWN_GAPS.get((entry.id, name))
        if gap is not None:
            assert verdict != "fail", (
                f"{entry.id}: check {name!r} now catches it: remove it from KNOWN_GAPS")
            gaps.append(f"{name}: {gap}")
            continue
        assert verdict == "fail", (
            f"{entry.id}: check {name!r} said {verdict!r}, expected 'fail'\n"
            f"bug: {entry.about}\n{_explain(result)}"
        )
    if gaps:
        pytest.xfail("known gap, reported: " + "; ".join(gaps))


def _assert_clean(entry: Entry, effort: str) -> None:
    expect = tuple(entry.declaration.get("expect", ()))
    missing = _missing(expect)
    # an opt-in check not registered in this tree cannot be asked for; the rest still must pass
    spec = entry.spec(expect=tuple(n for n in expect if n not in missing)) if missing else entry.spec()
    result = lossguard.run(spec, effort=effort)
    flagged = [c.name for c in result.checks if not c.ok]
    unexplained = [n for n in flagged if (entry.id, n) not in KNOWN_FALSE_ALARMS]
    assert not unexplained, f"{entry.id} ({entry.about}) was flagged:\n{_explain(result)}"
    ran = [c.name for c in result.checks if c.verdict == "pass"]
    assert ran, f"{entry.id}: no check ran at all"
    if flagged:
        pytest.xfail("known false alarm, reported: " + "; ".join(
            f"{n}: {KNOWN_FALSE_ALARMS[(entry.id, n)]}" for n in flagged))


@pytest.mark.parametrize("entry", BROKEN, ids=lambda e: e.id)
def test_broken_loss_is_caught(entry: Entry) -> None:
    _assert_caught(entry, "quick")


#: correct losses whose quick battery runs in the default suite: one per style family (numpy with a
#: declared grad, custom_vjp, probability inputs, soft targets, binary with a parameter, KL, sum
#: reduction, no reference, ignore label). The default suite's budget (90 s on the 2-core machine)
#: does not hold all of them; the others run at quick effort under ``-m slow``, and every correct
#: loss runs at the default effort there too.
EVERYDAY_CORRECT = frozenset({
    "correct-ce_numpy_with_grad", "correct-ce_custom_vjp", "correct-ce_probabilities_guarded",
    "correct-soft_target_ce", "correct-bce_log_sigmoid_weighted", "correct-kl_double_where",
    "correct-ce_summed", "correct-brier_score", "correct-ce_ignore_label",
}) | ({"correct-torch_ce_function"} if any(e.family == "torch" for e in BROKEN) else frozenset())


@pytest.mark.parametrize("entry", [
    pytest.param(e, id=e.id, marks=() if e.id in EVERYDAY_CORRECT else pytest.mark.slow) for e in CORRECT])
def test_correct_loss_passes(entry: Entry) -> None:
    _assert_clean(entry, "quick")


@pytest.mark.slow
@pytest.mark.parametrize("entry", BROKEN, ids=lambda e: e.id)
def test_broken_loss_is_caught_default_effort(entry: Entry) -> None:
    _assert_caught(entry, "default")


@pytest.mark.slow
@pytest.mark.parametrize("entry", CORRECT, ids=lambda e: e.id)
def test_correct_loss_passes_default_effort(entry: Entry) -> None:
    _assert_clean(entry, "default")


def test_corpus_size_and_coverage() -> None:
    """At least 30 broken and 12 correct entries, every entry described, ids unique."""
    assert len(BROKEN) >= 30 and len(CORRECT) >= 12
    ids = [e.id for e in BROKEN + CORRECT]
    assert len(ids) == len(set(ids))
    assert all(e.about for e in BROKEN + CORRECT)
    assert EVERYDAY_CORRECT <= set(ids)
    torch_broken = [e for e in BROKEN if e.family == "torch"]
    if torch_broken:  # registered where torch is installed (CI installs it)
        torch_correct = [e for e in CORRECT if "torch" in e.id.lower()]
        assert len(torch_broken) >= 12 and len(torch_correct) >= 6
    families = {e.family for e in BROKEN}
    assert {"numerics", "masks", "conventions", "reductions", "custom-grad", "precision"} <= families

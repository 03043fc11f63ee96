"""The pytest plugin, exercised in scratch projects (pytester).

Battery runs are pinned with ``only=[...]`` to checks that exist now, so that checks landing
later do not change what these tests see; "one item per check" is asserted as a relation with
``select_checks`` rather than a fixed number.
"""

from __future__ import annotations

import xml.etree.ElementTree as ET

import hypothesis  # noqa: F401  (imported here so in-process runs do not re-import it each time)
import pytest

import lossguard.runner
from lossguard import declare
from lossguard.checks import select_checks

pytest_plugins = ["pytester"]

LOSSES = '''
import jax
import jax.numpy as jnp


def good_ce(z, y):
    logp = jax.nn.log_softmax(z, axis=-1)
    return -jnp.mean(jnp.take_along_axis(logp, y[:, None], axis=-1))


def naive_ce(z, y):  # log of a softmax: inf once a softmax entry underflows to 0
    p = jax.nn.softmax(z, axis=-1)
    return -jnp.mean(jnp.log(jnp.take_along_axis(p, y[:, None], axis=-1)))


def scaled_ce(z, y):  # finite everywhere, but 1 % off the cross-entropy
    return 1.01 * good_ce(z, y)
'''

PINNED = '''
from lossguard.pytest_plugin import battery
from scratch_losses import good_ce, naive_ce, scaled_ce

test_good = battery(good_ce, kind="categorical", reference="categorical_ce", only=["reference"])
test_naive = battery(naive_ce, kind="categorical", reference="categorical_ce", only=["reference", "finite"])
test_scaled = battery(scaled_ce, kind="categorical", reference="categorical_ce", only=["reference", "shift"])
'''


def _project(pytester: pytest.Pytester, body: str = PINNED, name: str = "test_losses") -> None:
    pytester.makepyfile(scratch_losses=LOSSES)
    pytester.makepyfile(**{name: body})
    pytester.syspathinsert()


def _outcomes(reports) -> dict[str, str]:  # type: ignore[no-untyped-def]
    out = {}
    for r in reports:
        if r.when == "call" or (r.when == "setup" and r.outcome != "passed"):
            out[r.nodeid.split("::")[-1]] = r.outcome
    return out


def test_three_lines_give_one_item_per_check(pytester: pytest.Pytester) -> None:
    _project(pytester, body=(
        "from lossguard.pytest_plugin import battery\n"
        "from scratch_losses import good_ce\n"
        "test_my_loss = battery(good_ce, kind='categorical', reference='categorical_ce')\n"))
    result = pytester.runpytest_inprocess("--collect-only", "-q", "-p", "no:cacheprovider")
    names = [line.split("::")[-1] for line in result.outlines if "::" in line]
    spec = declare(lambda z, y: z, kind="categorical", reference="categorical_ce")
    expected = [f"test_my_loss[{check.name}]" for check, _ in select_checks(spec)]
    assert names == expected
    assert "test_my_loss[reference]" in names and "test_my_loss[finite]" in names


def test_a_broken_loss_fails_exactly_its_broken_checks(pytester: pytest.Pytester) -> None:
    _project(pytester)
    result = pytester.runpytest_inprocess("--lossguard-effort", "quick", "-p", "no:cacheprovider")
    got = _outcomes(result.reprec.getreports("pytest_runtest_logreport"))
    # naive: inf at confidently wrong rows (value and reference); scaled: 1 % off the reference
    # but exactly as shift-invariant as cross-entropy, so its shift item passes
    assert got == {"test_good[reference]": "passed", "test_naive[reference]": "failed",
                   "test_naive[finite]": "failed", "test_scaled[reference]": "failed",
                   "test_scaled[shift]": "passed"}
    # the failure message is the check's text report, headed by its summary
    text = result.stdout.str()
    assert "reference failed: value and gradient differ from reference 'categorical_ce'" in text
    assert "replay: loss(np.array(" in text
    assert "Traceback" not in text


def test_battery_runs_once_per_declaration_with_the_selected_checks(
    pytester: pytest.Pytester, monkeypatch: pytest.MonkeyPatch
) -> None:
    calls: list[dict] = []
    real = lossguard.runner.run

    def counting(spec, **kw):  # type: ignore[no-untyped-def]
        calls.append({"name": spec.name, **kw})
        return real(spec, **kw)

    monkeypatch.setattr(lossguard.runner, "run", counting)
    _project(pytester)
    result = pytester.runpytest_inprocess("-k", "scaled", "--lossguard-seed", "7", "--lossguard-effort", "quick",
                                          "-p", "no:cacheprovider")
    result.assert_outcomes(passed=1, failed=1, deselected=3)
    assert len(calls) == 1  # two items, one battery run
    assert sorted(calls[0]["only"]) == ["reference", "shift"]
    assert (calls[0]["seed"], calls[0]["effort"]) == (7, "quick")
    calls.clear()
    result = pytester.runpytest_inprocess("-k", "scaled and shift", "--lossguard-effort", "quick", "-p", "no:cacheprovider")
    result.assert_outcomes(passed=1, deselected=4)
    assert [c["only"] for c in calls] == [["shift"]]


def test_settings_from_ini_and_flags_reach_header_and_run(pytester: pytest.Pytester) -> None:
    _project(pytester, body="def test_nothing():\n    pass\n")
    pytester.makeini("[pytest]\nlossguard_effort = quick\nlossguard_seed = 5\n")
    result = pytester.runpytest_inprocess("-p", "no:cacheprovider")
    result.stdout.fnmatch_lines(["lossguard *: seed=5 (ini lossguard_seed), effort=quick (ini lossguard_effort)"])
    result = pytester.runpytest_inprocess("--lossguard-seed", "9", "-p", "no:cacheprovider")
    result.stdout.fnmatch_lines(["lossguard *: seed=9 (--lossguard-seed), effort=quick (ini lossguard_effort)"])
    result = pytester.runpytest_inprocess("--lossguard-effort", "fast", "-p", "no:cacheprovider")
    assert result.ret == pytest.ExitCode.USAGE_ERROR
    result.stderr.fnmatch_lines(["*--lossguard-effort='fast': expected one of quick, default, thorough*"])


def test_terminal_summary_lists_failed_checks_with_worst_case(pytester: pytest.Pytester) -> None:
    _project(pytester, body=PINNED.replace("test_good = ", "_unused = ").replace("test_scaled = ", "_also = "))
    result = pytester.runpytest_inprocess("--lossguard-effort", "quick", "-p", "no:cacheprovider")
    result.stdout.fnmatch_lines([
        "*lossguard: failed checks*",
        "test_losses.py::test_naive[[]reference[]]",
        "    reference (fail): value and gradient differ*",
        "    worst case: *ladder wrong*got inf*",
    ])


def test_run_battery_fixture_returns_or_fails(pytester: pytest.Pytester) -> None:
    _project(pytester, body='''
from scratch_losses import good_ce, naive_ce
from lossguard import declare

def test_good(run_battery):
    result = run_battery(good_ce, kind="categorical", reference="categorical_ce", only=["reference"])
    assert result.check("reference").verdict == "pass"

def test_naive_inspected(run_battery):
    result = run_battery(naive_ce, kind="categorical", reference="categorical_ce", only=["reference"],
                         require_pass=False)
    assert result.check("reference").verdict == "fail"

def test_naive_required(run_battery):
    spec = declare(naive_ce, kind="categorical", reference="categorical_ce")
    run_battery(spec, only=["reference"])

def test_bad_declaration(run_battery):
    run_battery(good_ce, kind="categorial")
''')
    result = pytester.runpytest_inprocess("--lossguard-effort", "quick", "-p", "no:cacheprovider")
    got = _outcomes(result.reprec.getreports("pytest_runtest_logreport"))
    assert got == {"test_good": "passed", "test_naive_inspected": "passed",
                   "test_naive_required": "failed", "test_bad_declaration": "failed"}
    result.stdout.fnmatch_lines(["*kind='categorial': expected one of binary, categorical, distribution*"])
    assert "Traceback" not in result.stdout.str()


def test_declaration_problems_and_collection_rules(pytester: pytest.Pytester) -> None:
    _project(pytester, body='''
import pytest
from lossguard.pytest_plugin import battery
from scratch_losses import good_ce

test_typo = battery(good_ce, kind="categorical", only=["refrence"])
test_slow = battery(good_ce, kind="categorical", reference="categorical_ce", only=["reference"],
                    marks=[pytest.mark.slow])
not_a_test_name = battery(good_ce, kind="categorical", only=["finite"])
''')
    pytester.makepyfile(test_reuse="from test_losses import test_slow\n")
    pytester.makeini("[pytest]\nmarkers =\n    slow: slow\n")
    result = pytester.runpytest_inprocess("--collect-only", "-q", "-p", "no:cacheprovider")
    items = [line for line in result.outlines if "::" in line]
    # the imported declaration is collected only where it was declared; the misnamed one not at all
    assert items == ["test_losses.py::test_typo[declaration]", "test_losses.py::test_slow[reference]"]
    result.stdout.fnmatch_lines(["*not_a_test_name = battery(...) is not collected*"])
    result = pytester.runpytest_inprocess("-m", "not slow", "-p", "no:cacheprovider", "test_losses.py")
    result.assert_outcomes(failed=1, deselected=1)
    result.stdout.fnmatch_lines(["*check='refrence': expected a check name; try 'reference'*"])
    result = pytester.runpytest_inprocess("-m", "lossguard and not slow", "--collect-only", "-q",
                                          "-p", "no:cacheprovider", "test_losses.py")
    assert [line for line in result.outlines if "::" in line] == ["test_losses.py::test_typo[declaration]"]


def _junit(path) -> dict[str, str]:  # type: ignore[no-untyped-def]
    out = {}
    for case in ET.parse(path).getroot().iter("testcase"):
        kids = {child.tag for child in case}
        out[case.get("name")] = ("failed" if kids & {"failure", "error"} else
                                 "skipped" if "skipped" in kids else "passed")
    return out


def test_xdist_gives_the_same_verdicts(pytester: pytest.Pytester) -> None:
    _project(pytester, body=PINNED.replace("test_naive = ", "_unused = "))
    common = ["--lossguard-effort", "quick", "-p", "no:cacheprovider", "-p", "no:benchmark",
              "-p", "no:hypothesispytest"]
    serial = pytester.runpytest_inprocess(*common, "--junitxml=serial.xml")
    parallel = pytester.runpytest_subprocess(*common, "-n", "2", "--junitxml=parallel.xml")
    assert serial.ret == parallel.ret == pytest.ExitCode.TESTS_FAILED
    a, b = _junit(pytester.path / "serial.xml"), _junit(pytester.path / "parallel.xml")
    assert a == b and len(a) == 3
    assert a == {"test_good[reference]": "passed", "test_scaled[reference]": "failed", "test_scaled[shift]": "passed"}
    # the closing summary is assembled on the controller from the workers' reports
    parallel.stdout.fnmatch_lines(["*lossguard: failed checks*", "test_losses.py::test_scaled[[]reference[]]"])

"""Reports: JSON schema, markdown, terminal text and colour, the progress indicator."""

from __future__ import annotations

import io
import json
from pathlib import Path

import numpy as np
import pytest

from lossguard.cli import main
from lossguard.compare import Comparison
from lossguard.report import (comparison_to_json, comparison_to_markdown, progress_for, render,
                              render_comparison, to_json, to_markdown, wants_colour)
from lossguard.report.text import one_line_example
from lossguard.result import CheckResult, Example, Result

REEF = Path(__file__).resolve().parent.parent / "lossguard" / "examples" / "reef_survey.py"


class _Terminal(io.StringIO):
    def isatty(self) -> bool:
        return True


def _example(**kw: object) -> Example:
    base = dict(what="value", predictions=np.array([[1e4, 0.0, -1e4]]), targets=np.array([2]),
                got=np.array(np.inf), expected=np.array(2e4), abs_err=float("inf"), rel_err=float("inf"),
                allowance=2e-10, note="ladder wrong |z|=1e+04", replay="loss(np.array([[1e4, 0, -1e4]]), np.array([2]))")
    base.update(kw)
    return Example(**base)  # type: ignore[arg-type]


def _result() -> Result:
    checks = [
        CheckResult(name="reference", verdict="fail", summary="value differs | on 1 of 9 cases", cases=9, failed=1,
                    allowance="2·γ_n·(|v*| + max|z|)", worst=[_example()], hint="use log_softmax",
                    details={"max_abs_error": float("nan")}),
        CheckResult(name="finite", verdict="pass", summary="finite on 18 cases", cases=18),
        CheckResult(name="shift", verdict="skip", summary="applies to kind categorical"),
    ]
    return Result(target="reef.py:tile_loss", spec={"kind": "categorical", "inputs": "logits", "reference": "categorical_ce"},
                  seed=4, effort="quick", checks=checks, evaluation={"adapter": "jax", "output": "scalar"},
                  versions={"lossguard": "0.1.0", "jax": "x"}, seconds=1.5, loss_evaluations=99)


def test_json_report_is_strict_and_follows_the_schema() -> None:
    text = to_json(_result())
    assert "NaN" not in text and "Infinity" not in text  # strict JSON (RFC 8259)
    doc = json.loads(text)
    assert doc["schema"] == "lossguard-result/1"
    assert {"target", "spec", "seed", "effort", "versions", "ok", "checks"} <= set(doc)
    assert (doc["seed"], doc["ok"], doc["target"]) == (4, False, "reef.py:tile_loss")
    first = doc["checks"][0]
    assert {"name", "verdict", "cases", "failed", "allowance", "worst", "summary", "hint"} <= set(first)
    worst = first["worst"][0]
    assert worst["got"] == "inf" and worst["abs_err"] == "inf" and worst["expected"] == 20000.0
    assert worst["predictions"] == [[1e4, 0.0, -1e4]]
    assert first["details"]["max_abs_error"] == "nan"
    assert [c["verdict"] for c in doc["checks"]] == ["fail", "pass", "skip"]


def test_markdown_has_a_row_per_check_and_details_for_failures() -> None:
    md = to_markdown(_result())
    assert md.startswith("### lossguard: `reef.py:tile_loss` — some checks failed")
    assert "| `reference` | **failed** | 9 | value differs \\| on 1 of 9 cases |" in md
    assert "| `finite` | passed | 18 |" in md and "| `shift` | skipped |" in md
    assert md.count("<details>") == 1 and "loss(np.array([[1e4, 0, -1e4]]), np.array([2]))" in md
    assert "Hint: use log_softmax" in md


def test_text_colour_only_when_asked_and_only_on_a_terminal(monkeypatch: pytest.MonkeyPatch) -> None:
    plain, coloured = render(_result()), render(_result(), color=True)
    assert "\x1b[" not in plain and "\x1b[31m" in coloured
    assert "FAIL  reference" in plain and "replay: loss(" in plain
    monkeypatch.delenv("NO_COLOR", raising=False)
    assert wants_colour(_Terminal()) and not wants_colour(io.StringIO())
    monkeypatch.setenv("NO_COLOR", "1")  # the no-color.org convention
    assert not wants_colour(_Terminal())
    line = one_line_example(_example())
    assert line == "value [ladder wrong |z|=1e+04]: got inf, expected 20000"


def test_progress_only_on_a_terminal() -> None:
    with progress_for(io.StringIO()) as update:
        assert update is None
    pytest.importorskip("rich")  # the bar is drawn with rich, an optional dependency
    screen = _Terminal()
    with progress_for(screen, title="battery") as update:
        assert update is not None
        for i, name in enumerate(["reference", "finite"]):
            update(name, i, 2)
        update("done", 2, 2)
    assert "battery" in screen.getvalue()  # drawn on the terminal (then cleared: transient)


def test_runner_reports_progress_in_battery_order() -> None:
    import jax
    import jax.numpy as jnp

    from lossguard import declare, run

    def ce(z, y):  # type: ignore[no-untyped-def]
        return -jnp.mean(jnp.take_along_axis(jax.nn.log_softmax(z, axis=-1), y[:, None], axis=-1))

    seen: list[tuple[str, int, int]] = []
    result = run(declare(ce, kind="categorical", reference="categorical_ce"), effort="quick",
                 only=["reference"], progress=lambda *a: seen.append(a))
    assert seen == [("reference", 0, 1), ("done", 1, 1)] and result.ok


def test_check_command_writes_json_and_markdown(tmp_path: Path, capsys: pytest.CaptureFixture[str]) -> None:
    j, m = tmp_path / "r.json", tmp_path / "r.md"
    code = main(["check", f"{REEF}:tile_loss_old", "--kind", "categorical", "--reference", "categorical_ce",
                 "--only", "reference", "--effort", "quick", "--json", str(j), "--markdown", str(m)])
    out = capsys.readouterr().out
    assert code == 1 and "\x1b[" not in out  # captured output is not a terminal: no colour
    doc = json.loads(j.read_text())
    assert [(c["name"], c["verdict"]) for c in doc["checks"]] == [("reference", "fail")]
    assert doc["checks"][0]["worst"][0]["got"] == "inf"
    assert "| `reference` | **failed** |" in m.read_text()


def test_comparison_renderings() -> None:
    part = CheckResult(name="gradient float64", verdict="fail", summary="gradients differ on 1 of 8 cases",
                       cases=8, failed=1, allowance="rule")
    ok = CheckResult(name="value float64", verdict="pass", summary="values agree on 8 cases", cases=8)
    small = _example(what="gradient in float64", got=np.array([[0.0, 1e-27]]), expected=np.array([[np.nan, np.nan]]),
                     note="shrunk to 1 of 8 rows")
    c = Comparison(old="a.py:v1", new="a.py:v2", spec={"kind": "categorical", "inputs": "logits"}, seed=0,
                   effort="quick", parts=[ok, part], largest=small, smallest=small,
                   evaluation={"old": {"adapter": "jax"}, "new": {"adapter": "numpy"}})
    text = render_comparison(c)
    assert "adapters jax / numpy" in text and "smallest input that shows it: gradient in float64" in text
    assert "OLD          [[nan, nan]]" in text and "the implementations diverge (exit 1)" in text
    doc = json.loads(comparison_to_json(c))
    assert doc["schema"] == "lossguard-comparison/1" and doc["agree"] is False
    assert doc["smallest"]["expected"] == [["nan", "nan"]]
    md = comparison_to_markdown(c)
    assert "— the implementations diverge" in md and "**Smallest input that shows it**" in md
    assert "OLD          [[nan, nan]]" in md

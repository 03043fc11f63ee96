"""``lossguard profile``: safe logit range per dtype, against an mpmath oracle, and its plot.

Runs on the bundled coral-reef example (``lossguard/examples/reef_survey.py``): the shipped
``tile_loss`` and the old ``tile_loss_old`` that took the log of a softmax.
"""

from __future__ import annotations

import sys
from pathlib import Path

import numpy as np
import pytest

from lossguard import declare
from lossguard.cli import main
from lossguard.errors import SpecError
from lossguard.commands.profile import render_profile
from lossguard.examples.reef_survey import tile_loss, tile_loss_old
from lossguard.profile import Profile, profile
from lossguard.tolerance import DTYPES

EXAMPLE = str(Path(__file__).resolve().parents[1] / "lossguard" / "examples" / "reef_survey.py")


@pytest.fixture(scope="module")
def shipped() -> Profile:
    return profile(declare(tile_loss, kind="categorical", reference="categorical_ce"), target="tile_loss",
                   dtypes=("float16", "float64"))


def test_command_prints_the_safe_range_per_dtype_and_writes_a_png(tmp_path: Path,
                                                                   capsys: pytest.CaptureFixture[str]) -> None:
    png = tmp_path / "profile.png"
    code = main(["profile", f"{EXAMPLE}:tile_loss", "--kind", "categorical", "--reference", "categorical_ce",
                 "--png", str(png)])
    out = capsys.readouterr().out
    assert code == 0
    assert "oracle: reference 'categorical_ce' evaluated in mpmath" in out
    rows = [line.split() for line in out.splitlines() if line.strip().startswith(DTYPES)]
    assert [r[0] for r in rows] == list(DTYPES)
    assert all(float(r[1]) > 1e3 for r in rows)  # a stable loss: safe far beyond everyday logits
    assert png.read_bytes()[:8] == b"\x89PNG\r\n\x1a\n"  # the PNG signature (PNG specification, RFC 2083)


def test_a_stable_loss_is_accurate_until_the_true_value_leaves_the_range(shipped: Profile) -> None:
    f16 = shipped.row("float16")
    # wrong rows at |z| give a loss ≈ 2|z|: float16's 65504 is passed beyond |z| ≈ 32752
    assert 1e4 <= f16.safe_limit < 32752 and "exceeds float16's range" in f16.end
    for r in shipped.rows:
        inside = r.magnitudes <= r.safe_limit
        assert np.all(r.ok[inside]) and np.all(r.value_ulps[inside] <= r.value_allowance_ulps[inside])
        wv, wg = r.worst_inside()
        assert wv < 8 and wg < 8  # a few ULPs: log_softmax is accurate at every magnitude
    assert shipped.row("float64").safe_limit >= 1e300


def test_log_of_softmax_is_cut_short_by_an_intermediate_overflow(shipped: Profile) -> None:
    old = profile(declare(tile_loss_old, kind="categorical", reference="categorical_ce"),
                  dtypes=("float64",))
    for d in ("float64",):
        assert old.row(d).safe_limit < 1e3 < shipped.row(d).safe_limit
        assert "intermediate overflowed" in old.row(d).end
    text = render_profile(old)
    assert "float64" in text and "non-finite" in text


def test_without_a_reference_the_oracle_is_the_loss_in_float64() -> None:
    prof = profile(declare(tile_loss_old, kind="categorical"), dtypes=("float16", "float64"))
    assert "own float64" in prof.oracle
    assert prof.row("float64").judged == "finiteness"
    assert prof.row("float16").safe_limit < 30  # the old loss breaks early in float16 too


def test_missing_matplotlib_is_one_line(monkeypatch: pytest.MonkeyPatch, tmp_path: Path,
                                        capsys: pytest.CaptureFixture[str]) -> None:
    monkeypatch.setitem(sys.modules, "matplotlib.figure", None)  # import now raises ImportError
    code = main(["profile", f"{EXAMPLE}:tile_loss", "--kind", "categorical", "--png", str(tmp_path / "x.png")])
    err = capsys.readouterr().err
    assert code == 2 and err.count("\n") == 1 and "pip install matplotlib" in err


def test_without_mpmath_the_float64_reference_stands_in(monkeypatch: pytest.MonkeyPatch) -> None:
    import lossguard._mp_oracle as oracle

    monkeypatch.setattr(oracle, "_MP", None)
    prof = profile(declare(tile_loss, kind="categorical", reference="categorical_ce"), dtypes=("float32",))
    assert "mpmath is not installed" in prof.oracle and prof.row("float32").safe_limit > 1e30


def test_effort_sets_the_rows_of_each_profiled_case(capsys: pytest.CaptureFixture[str]) -> None:
    spec = declare(tile_loss, kind="categorical", reference="categorical_ce")
    quick = profile(spec, dtypes=("float64",), effort="quick")
    assert quick.shape.startswith("2x") and profile(spec, dtypes=("float64",)).shape.startswith("4x")
    code = main(["profile", f"{EXAMPLE}:tile_loss", "--kind", "categorical", "--dtype", "float64",
                 "--effort", "thorough"])
    assert code == 0 and "16x" in capsys.readouterr().out  # the command passes --effort through
    with pytest.raises(SpecError, match=r"effort='quik': expected quick, default or thorough; try 'quick'"):
        profile(spec, effort="quik")

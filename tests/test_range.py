"""The declared operating range: how it is written, refused, and carried to every skin."""

from __future__ import annotations

import math
import subprocess
import sys

import numpy as np
import pytest

from lossguard import declare
from lossguard._range import Beyond, case_reach, parse_dtypes, parse_max_logit
from lossguard.errors import SpecError


def ce(z, y):  # noqa: ANN001, ANN201
    import jax

    return -jax.numpy.take_along_axis(jax.nn.log_softmax(z), y[:, None], -1).mean()


def test_the_range_is_parsed_and_kept_in_the_declaration() -> None:
    spec = declare(ce, kind="categorical", dtypes="float64, float32", max_logit="full")
    assert spec.dtypes == ("float32", "float64") and math.isinf(spec.max_logit)
    assert spec.describe()["max_logit"] == "full" and spec.describe()["dtypes"] == ["float32", "float64"]
    assert declare(ce, kind="categorical").max_logit == 1e3


@pytest.mark.parametrize("bad", [0, -1, "wide", True, float("nan")])
def test_a_bad_max_logit_is_one_clear_line(bad: object) -> None:
    with pytest.raises(SpecError, match=r"^max_logit=.*: expected a positive number or 'full'; try "):
        parse_max_logit(bad)


def test_a_bad_dtype_names_the_closest() -> None:
    with pytest.raises(SpecError, match=r"dtypes='float23': expected names from .*float32"):
        parse_dtypes("float23,float64")
    with pytest.raises(SpecError, match="at least one"):
        parse_dtypes("")


def test_reach_ignores_masks_and_probabilities() -> None:
    z = np.array([[[1.0, -np.inf, -5.0]], [[2e3, 0.0, 0.0]]])
    assert case_reach("logits", z).tolist() == [5.0, 2e3]
    assert case_reach("probabilities", z).tolist() == [0.0, 0.0]


def test_beyond_names_the_last_rung_that_held_and_the_first_that_broke() -> None:
    b = Beyond(1e3)
    b.add("float16", np.array([10.0, 1e3, 1e4, 6.5e4]), np.array([False, False, False, True]),
          ["", "", "", "value is inf"])
    assert b.lines() == ["finite up to |z| = 1e+04 in float16; beyond, first at |z| = 6.5e+04: value is inf"]
    b.add("float32", np.array([5.0, 2e3]), np.array([True, True]), ["value is nan", "value is nan"])
    assert "in float32 beyond the range, first at |z| = 2e+03" in b.note()  # broke inside: no "up to"


def test_the_command_line_refuses_a_bad_range_with_exit_2(tmp_path) -> None:  # noqa: ANN001
    src = tmp_path / "loss.py"
    src.write_text("import jax\ndef ce(z, y):\n    return jax.nn.logsumexp(z, -1).mean()\n")
    out = subprocess.run([sys.executable, "-m", "lossguard", "check", f"{src}:ce", "--kind", "categorical",
                          "--max-logit", "wide"], capture_output=True, text=True)
    assert out.returncode == 2 and "max_logit='wide': expected" in out.stderr
    assert "Traceback" not in out.stderr

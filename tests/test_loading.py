"""Targets given as file paths or module paths."""

from __future__ import annotations

import pytest

from lossguard import TargetLoadError, load_target


def test_file_and_module_targets(tmp_path):
    f = tmp_path / "kiln_losses.py"
    f.write_text("def firing_loss(z, y):\n    return 0.0\n")
    assert load_target(f"{f}:firing_loss")(1, 2) == 0.0
    assert load_target("os.path:join")("a", "b") == "a/b"


@pytest.mark.parametrize(
    "target, fragment",
    [
        ("no_colon_here", "expected FILE.py:FUNCTION"),
        ("/nonexistent/dir/x.py:f", "expected an existing .py file"),
        ("not_a_real_module_xyz:f", "expected an importable module"),
        ("os.path:jion", "try 'join'"),
        ("os:sep", "expected a callable"),
    ],
)
def test_bad_targets(target, fragment):
    with pytest.raises(TargetLoadError) as info:
        load_target(target)
    assert fragment in str(info.value) and "\n" not in str(info.value)


def test_module_that_fails_to_import(tmp_path):
    f = tmp_path / "broken_mod.py"
    f.write_text("raise RuntimeError('kiln offline')\n")
    with pytest.raises(TargetLoadError) as info:
        load_target(f"{f}:anything")
    assert "kiln offline" in str(info.value)

"""Every adapter implements the whole protocol; nothing outside adapters/ and evaluate.py knows
which adapter it has (callers read ``capabilities``)."""

from __future__ import annotations

import ast
import typing
from pathlib import Path

import jax.numpy as jnp
import numpy as np
import pytest

from lossguard.adapters._base import ADAPTER_MEMBERS, Adapter, Capabilities
from lossguard.adapters.jax_loss import JaxAdapter
from lossguard.adapters.numpy_loss import NumpyAdapter

PACKAGE = Path(__file__).resolve().parents[1] / "lossguard"
CONCRETE = ("jax_loss", "numpy_loss", "torch_loss")


def _mean(z, y):
    return jnp.mean(z)


def _adapters() -> list[object]:
    made: list[object] = [JaxAdapter(_mean, {}), JaxAdapter(_mean, {}, vectorised=False),
                          NumpyAdapter(lambda z, y: np.mean(z), {})]
    try:
        import torch  # noqa: F401
    except ImportError:
        return made
    from lossguard.adapters.torch_loss import TorchAdapter

    return made + [TorchAdapter(lambda z, y: z.mean(), {})]


def test_the_member_list_is_the_protocol() -> None:
    declared = set(typing.get_type_hints(Adapter)) | {n for n in vars(Adapter) if not n.startswith("_")}
    assert declared == set(ADAPTER_MEMBERS)


@pytest.mark.parametrize("adapter", _adapters(), ids=lambda a: type(a).__name__ + ":" + a.name)
def test_every_adapter_has_every_member(adapter: object) -> None:
    missing = [m for m in ADAPTER_MEMBERS if not hasattr(adapter, m)]
    assert not missing
    assert isinstance(adapter, Adapter)  # runtime_checkable: every member present
    assert isinstance(adapter.capabilities, Capabilities)
    for method in ("values", "value_and_grad", "jvp", "hvp", "prepare", "cancel_pending"):
        assert callable(getattr(adapter, method))
    adapter.prepare([])  # a no-op where nothing compiles; never raises
    adapter.cancel_pending()


def type_tests(source: str, path: str = "<snippet>") -> list[str]:
    """Places in ``source`` that import a concrete adapter or test an adapter's type."""
    found = []
    for node in ast.walk(ast.parse(source)):
        if isinstance(node, ast.ImportFrom):
            mod = node.module or ""
            names = {a.name for a in node.names}
            if mod.split(".")[-1] in CONCRETE or (mod.endswith("adapters") and names & set(CONCRETE)):
                found.append(f"{path}:{node.lineno}: imports {mod} {sorted(names)}")
        elif isinstance(node, ast.Call) and isinstance(node.func, ast.Name) and len(node.args) == 2:
            text = ast.unparse(node.args[1]) if node.func.id == "isinstance" else ast.unparse(node.args[0])
            if (node.func.id == "isinstance" and "Adapter" in text) or (node.func.id == "hasattr"
                                                                         and "adapter" in text):
                found.append(f"{path}:{node.lineno}: {ast.unparse(node)}")
    return found


def test_the_scan_finds_type_tests() -> None:
    # the lines that dispatched on adapter types before capabilities existed
    before = (
        "from ..adapters.jax_loss import JaxAdapter\n"
        "from .adapters import jax_loss\n"
        "if forward and isinstance(ev.adapter, JaxAdapter): pass\n"
        "if not self.has_autodiff or not hasattr(self.adapter, 'hvp'): pass\n"
        "if isinstance(self.adapter, jax_loss.JaxAdapter): pass\n"
    )
    assert len(type_tests(before)) == 5
    assert type_tests("if ev.capabilities.forward_mode: pass\nfrom .adapters._base import first_line\n") == []


def test_no_module_outside_the_adapters_knows_adapter_types() -> None:
    found = []
    for path in sorted(PACKAGE.rglob("*.py")):
        rel = path.relative_to(PACKAGE).as_posix()
        if rel.startswith("adapters/") or rel == "evaluate.py":
            continue
        found += type_tests(path.read_text(), rel)
    assert found == []

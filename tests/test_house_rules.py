"""The library's layering rules, read from its source with ``ast`` (nothing is imported).

- a check is a leaf: no module in ``lossguard/checks/`` that defines ``CHECK`` imports another one;
- the package's imports have no cycle, counting imports made inside functions (which hide a cycle
  from the import machinery until the function runs) and leaving out ``if TYPE_CHECKING:``;
- no function is longer than 80 lines, its docstring excluded (the house style of DEVELOPERS.md).

Each rule is shown to fail on a small synthetic tree as well, so none of them passes by finding
nothing to look at.
"""

from __future__ import annotations

import ast
from pathlib import Path

import pytest

ROOT = Path(__file__).resolve().parent.parent / "lossguard"
LONGEST = 80


def _modules(root: Path) -> dict[str, Path]:
    """Dotted module name → file, for every module under ``root`` (packages by their __init__)."""
    out = {}
    for path in sorted(root.rglob("*.py")):
        parts = list(path.relative_to(root.parent).with_suffix("").parts)
        if parts[-1] == "__init__":
            parts.pop()
        out[".".join(parts)] = path
    return out


def _is_type_checking(node: ast.If) -> bool:
    test = node.test
    return (isinstance(test, ast.Name) and test.id == "TYPE_CHECKING") or (
        isinstance(test, ast.Attribute) and test.attr == "TYPE_CHECKING")


def _import_nodes(tree: ast.AST) -> list[ast.Import | ast.ImportFrom]:
    """Every import statement, at any depth (inside functions too), except under TYPE_CHECKING."""
    found: list[ast.Import | ast.ImportFrom] = []
    stack: list[ast.AST] = [tree]
    while stack:
        node = stack.pop()
        if isinstance(node, ast.If) and _is_type_checking(node):
            stack.extend(node.orelse)
            continue
        if isinstance(node, (ast.Import, ast.ImportFrom)):
            found.append(node)
        stack.extend(ast.iter_child_nodes(node))
    return found


def _imports(name: str, path: Path, known: set[str]) -> set[str]:
    """The package modules ``name`` imports: the named module, a package's submodules named in a
    ``from`` import, and the subpackages whose ``__init__`` runs on the way (not the root's, nor
    those of the packages ``name`` itself belongs to, which are already running)."""
    is_pkg = path.name == "__init__.py"
    out: set[str] = set()
    for node in _import_nodes(ast.parse(path.read_text())):
        targets: list[str] = []
        if isinstance(node, ast.Import):
            targets = [a.name for a in node.names]
        else:
            base = name.split(".") if is_pkg else name.split(".")[:-1]
            if node.level:
                base = base[:len(base) - node.level + 1]
                mod = ".".join(base + ([node.module] if node.module else []))
            else:
                mod = node.module or ""
            targets = [mod] + [f"{mod}.{a.name}" for a in node.names]
        for t in targets:
            parts = t.split(".")
            for i in range(2, len(parts) + 1):  # parent packages run first; the root's is left out
                sub = ".".join(parts[:i])
                # a package's own __init__ is already running while its submodules import
                # (and ``from . import x`` in an __init__ names the package itself)
                if sub in known and not name.startswith(sub + ".") and not (is_pkg and sub == name):
                    out.add(sub)
    return out


def _graph(root: Path) -> dict[str, set[str]]:
    mods = _modules(root)
    return {name: _imports(name, path, set(mods)) for name, path in mods.items()}


def _check_modules(root: Path) -> set[str]:
    """The modules of ``<root>/checks`` that define ``CHECK`` at top level."""
    out = set()
    for name, path in _modules(root).items():
        if not name.startswith(f"{root.name}.checks."):
            continue
        tree = ast.parse(path.read_text())
        for node in tree.body:
            targets = node.targets if isinstance(node, ast.Assign) else (
                [node.target] if isinstance(node, ast.AnnAssign) else [])
            if any(isinstance(t, ast.Name) and t.id == "CHECK" for t in targets):
                out.add(name)
    return out


def check_to_check_imports(root: Path) -> list[str]:
    graph, checks = _graph(root), _check_modules(root)
    return sorted(f"{a} -> {b}" for a in checks for b in graph[a] if b in checks)


def cycles(root: Path) -> list[list[str]]:
    """The strongly connected components of more than one module (Tarjan), and self-imports."""
    graph = _graph(root)
    index: dict[str, int] = {}
    low: dict[str, int] = {}
    on, stack, out = set(), [], []

    def visit(v: str) -> None:
        index[v] = low[v] = len(index)
        stack.append(v)
        on.add(v)
        for w in sorted(graph[v]):
            if w not in index:
                visit(w)
                low[v] = min(low[v], low[w])
            elif w in on:
                low[v] = min(low[v], index[w])
        if low[v] == index[v]:
            comp = []
            while True:
                w = stack.pop()
                on.discard(w)
                comp.append(w)
                if w == v:
                    break
            if len(comp) > 1 or v in graph[v]:
                out.append(sorted(comp))

    for v in sorted(graph):
        if v not in index:
            visit(v)
    return out


def long_functions(root: Path, most: int = LONGEST) -> list[str]:
    """Functions longer than ``most`` lines, their docstring excluded."""
    out = []
    for name, path in _modules(root).items():
        for node in ast.walk(ast.parse(path.read_text())):
            if not isinstance(node, (ast.FunctionDef, ast.AsyncFunctionDef)):
                continue
            length = node.end_lineno - node.lineno + 1  # type: ignore[operator]
            body0 = node.body[0]
            if isinstance(body0, ast.Expr) and isinstance(body0.value, ast.Constant) and isinstance(
                    body0.value.value, str):
                length -= body0.end_lineno - body0.lineno + 1  # type: ignore[operator]
            if length > most:
                out.append(f"{name}.{node.name}: {length} lines")
    return sorted(out)


def test_a_check_imports_no_other_check() -> None:
    assert len(_check_modules(ROOT)) >= 10  # the rule below has checks to look at
    assert check_to_check_imports(ROOT) == []


def test_the_package_imports_have_no_cycle() -> None:
    assert cycles(ROOT) == []


def test_no_function_is_longer_than_80_lines() -> None:
    assert long_functions(ROOT) == []


def _tree(tmp_path: Path, files: dict[str, str]) -> Path:
    root = tmp_path / "pkg"
    for rel, text in files.items():
        p = root / rel
        p.parent.mkdir(parents=True, exist_ok=True)
        p.write_text(text)
    return root


def test_the_rules_fail_on_a_tree_that_breaks_them(tmp_path: Path) -> None:
    root = _tree(tmp_path, {
        "__init__.py": "",
        "checks/__init__.py": "",
        "checks/a.py": "from .b import x\nCHECK = 1\n",
        "checks/b.py": "x = 1\nCHECK = 2\n",
        "checks/_shared.py": "y = 1\n",
        "checks/c.py": "from ._shared import y\nCHECK = 3\n",
        "low.py": "def f():\n    from .high import g\n    return g\n",
        "high.py": "from .low import f\n\ndef g():\n" + "    x = 1\n" * 81,
        "typed.py": "from typing import TYPE_CHECKING\nif TYPE_CHECKING:\n    from .high import g\n",
        "selfish.py": "from .selfish import z\n",
    })
    assert check_to_check_imports(root) == ["pkg.checks.a -> pkg.checks.b"]
    assert cycles(root) == [["pkg.high", "pkg.low"], ["pkg.selfish"]]  # the import inside f counts
    assert long_functions(root) == ["pkg.high.g: 82 lines"]


@pytest.mark.parametrize("doc_lines", [1, 5])
def test_a_docstring_does_not_count_toward_length(tmp_path: Path, doc_lines: int) -> None:
    doc = '    """' + "\n    ".join(["text"] * doc_lines) + '"""\n'
    root = _tree(tmp_path, {"__init__.py": "", "m.py": "def f():\n" + doc + "    x = 1\n" * 79})
    assert long_functions(root) == []

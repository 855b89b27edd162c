"""The package's layout rules (DEVELOPERS.md, "Where things live"): small modules, no import
cycle, and no module reaching into another module's private names."""

from __future__ import annotations

import ast
import importlib.util
from pathlib import Path

import pytest

ROOT = Path(__file__).resolve().parent.parent / "xrec"
MAX_LINES = 520  # "keep modules under ~500 lines"


def _modules() -> dict[str, Path]:
    out = {}
    for path in sorted(ROOT.rglob("*.py")):
        parts = path.relative_to(ROOT.parent).with_suffix("").parts
        name = ".".join(parts[:-1] if parts[-1] == "__init__" else parts)
        out[name] = path
    return out


MODULES = _modules()


def _is_module(name: str) -> bool:
    return name in MODULES


def _runtime_imports(tree: ast.Module) -> list[ast.Import | ast.ImportFrom]:
    """Every import that can run: module level or inside functions, not under ``if TYPE_CHECKING:``."""
    skip: set[int] = set()
    for node in ast.walk(tree):
        if isinstance(node, ast.If) and "TYPE_CHECKING" in ast.unparse(node.test):
            skip |= {id(n) for child in node.body for n in ast.walk(child)}
    return [n for n in ast.walk(tree) if isinstance(n, (ast.Import, ast.ImportFrom)) and id(n) not in skip]


def _edges(name: str, tree: ast.Module) -> set[str]:
    """xrec modules ``name`` imports (``from pkg import sub`` imports ``pkg.sub``).

    Imports inside functions count too: a module that imports another one lazily still
    depends on it, and the two then belong in one order, not a circle.
    """
    out = set()
    for node in _runtime_imports(tree):
        if isinstance(node, ast.Import):
            out |= {a.name for a in node.names if a.name.startswith("xrec")}
        elif node.module and node.module.startswith("xrec") and node.level == 0:
            subs = {f"{node.module}.{a.name}" for a in node.names if _is_module(f"{node.module}.{a.name}")}
            others = [a for a in node.names if not _is_module(f"{node.module}.{a.name}")]
            out |= subs | ({node.module} if others else set())
    # A package imported by one of its own modules is already being imported (its
    # __init__ runs first), so that edge closes no circle.
    return {m for m in out if m != name and not name.startswith(m + ".")}


@pytest.mark.parametrize("name", sorted(MODULES))
def test_module_stays_small(name):
    n_lines = len(MODULES[name].read_text(encoding="utf-8").splitlines())
    assert n_lines <= MAX_LINES, f"{name} has {n_lines} lines; split it along its seams (DEVELOPERS.md)"


def _find_cycle(graph: dict[str, set[str]]) -> list[str] | None:
    state: dict[str, int] = {}
    stack: list[str] = []

    def visit(node: str) -> None:
        state[node] = 1
        stack.append(node)
        for dep in sorted(graph.get(node, ())):
            if state.get(dep) == 1:
                raise _Cycle(stack[stack.index(dep) :] + [dep])
            if dep in graph and dep not in state:
                visit(dep)
        stack.pop()
        state[node] = 2

    try:
        for name in sorted(graph):
            if name not in state:
                visit(name)
    except _Cycle as found:
        return found.args[0]
    return None


class _Cycle(Exception):
    pass


def test_no_import_cycle():
    graph = {name: _edges(name, ast.parse(path.read_text(encoding="utf-8"))) for name, path in MODULES.items()}
    cycle = _find_cycle(graph)
    assert cycle is None, "import cycle: " + " -> ".join(cycle or [])


def _private_defined(tree: ast.Module) -> set[str]:
    """Private names a module defines: functions, classes, assignments and ``self._x`` attributes."""
    names = set()
    for node in ast.walk(tree):
        if isinstance(node, (ast.FunctionDef, ast.AsyncFunctionDef, ast.ClassDef)):
            names.add(node.name)
        elif isinstance(node, ast.Attribute) and isinstance(node.ctx, ast.Store):
            names.add(node.attr)
        elif isinstance(node, ast.Name) and isinstance(node.ctx, ast.Store):
            names.add(node.id)
    return {n for n in names if n.startswith("_")}


def _private_uses(path: Path) -> list[str]:
    tree = ast.parse(path.read_text(encoding="utf-8"))
    own = _private_defined(tree)
    problems = []
    for node in ast.walk(tree):
        if isinstance(node, ast.ImportFrom) and node.module and node.module.startswith("xrec"):
            for alias in node.names:
                private = alias.name.startswith("_") and not alias.name.startswith("__")
                if private and importlib.util.find_spec(node.module) and not _is_module(f"{node.module}.{alias.name}"):
                    problems.append(f"line {node.lineno}: from {node.module} import {alias.name}")
        elif isinstance(node, ast.Attribute):
            attr = node.attr
            dunder_or_protocol = attr.startswith("__") or attr.endswith("_")  # __x__, IPython's _repr_html_
            on_self = isinstance(node.value, ast.Name) and node.value.id in ("self", "cls")
            if attr.startswith("_") and not dunder_or_protocol and not on_self and attr not in own:
                problems.append(f"line {node.lineno}: {ast.unparse(node)}")
    return problems


def test_no_module_uses_another_modules_private_names():
    found = {name: _private_uses(path) for name, path in MODULES.items()}
    found = {name: uses for name, uses in found.items() if uses}
    assert not found, f"private names used across modules (make them public in a _module, or move the code): {found}"


def test_the_guards_catch_what_they_guard(tmp_path):
    # The checks themselves must fail on a bad module, or they prove nothing.
    bad = tmp_path / "bad.py"
    bad.write_text("from xrec.evaluate._ranking import _private_helper\nvalue = engine._seen\n", encoding="utf-8")
    assert len(_private_uses(bad)) == 2
    ok = tmp_path / "ok.py"
    ok.write_text("from xrec.encoders import _common\nclass A:\n    def f(self, other):\n        return other._x\n    _x = 1\n", encoding="utf-8")
    assert _private_uses(ok) == []
    lazy = ast.parse("def f():\n    from xrec.blend.learn import learn_weights\nif TYPE_CHECKING:\n    import xrec.fold\n")
    assert _edges("xrec.blend.gating", lazy) == {"xrec.blend.learn"}
    assert _find_cycle({"a": {"b"}, "b": {"c"}, "c": {"a"}}) == ["a", "b", "c", "a"]
    assert _find_cycle({"a": {"b"}, "b": set()}) is None

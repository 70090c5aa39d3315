"""The package's imports run one way: each module imports only from its own or a lower layer.

Layers, lowest first (docs/architecture.md): errors and _base -> data -> stratify -> inference
-> estimation -> sensitivity -> spec and result -> render -> pipeline -> cli, demo. Every import
is walked with ``ast``, imports inside functions included (``if TYPE_CHECKING:`` blocks
excepted). The one allowed upward import is the result's notebook conveniences reaching render,
listed in ALLOWED_UPWARD by name.
"""

from __future__ import annotations

import ast
import textwrap
from pathlib import Path

import pytest

import stratagap

PACKAGE = Path(stratagap.__file__).resolve().parent

LAYERS = [
    ("errors", "_base"),
    ("data",),
    ("stratify",),
    ("inference",),
    ("estimation",),
    ("sensitivity",),
    ("spec", "result"),
    ("render",),
    ("pipeline", "_cluster_wiring", "_followup_wiring", "_survival_wiring", "_rate_wiring"),
    ("cli", "demo", "__main__", ""),
]

ALLOWED_UPWARD = {  # the result's notebook conveniences render the result they belong to:
    # tables, _repr_html_ and figures (render.notebook), summary(), save() (render.files)
    ("stratagap.result", "stratagap.render.tables"),
    ("stratagap.result", "stratagap.render.notebook"),
    ("stratagap.result", "stratagap.render.summary"),
    ("stratagap.result", "stratagap.render.files"),
}


def modules_of(root: Path, name: str) -> dict[str, Path]:
    """Dotted module name -> file, for every .py file of the package at ``root``."""
    out = {}
    for path in sorted(root.rglob("*.py")):
        parts = list(path.relative_to(root).with_suffix("").parts)
        if parts[-1] == "__init__":
            parts = parts[:-1]
        out[".".join([name, *parts])] = path
    return out


def _is_type_checking(node) -> bool:
    test = node.test
    return (isinstance(test, ast.Name) and test.id == "TYPE_CHECKING") or (
        isinstance(test, ast.Attribute) and test.attr == "TYPE_CHECKING")


def _imports(tree):
    """Import nodes anywhere in the tree except under ``if TYPE_CHECKING:``."""
    stack = [tree]
    while stack:
        node = stack.pop()
        if isinstance(node, ast.If) and _is_type_checking(node):
            stack.extend(node.orelse)
            continue
        if isinstance(node, (ast.Import, ast.ImportFrom)):
            yield node
        stack.extend(ast.iter_child_nodes(node))


def import_edges(root: Path, name: str) -> set[tuple[str, str]]:
    """(importer, imported) pairs between modules of the package, absolute and relative."""
    modules = modules_of(root, name)
    edges = set()
    for module, path in modules.items():
        is_package = path.name == "__init__.py"
        here = module.split(".") if is_package else module.split(".")[:-1]
        for node in _imports(ast.parse(path.read_text(encoding="utf-8"), str(path))):
            if isinstance(node, ast.Import):
                targets = [alias.name for alias in node.names]
            else:
                if node.level:
                    base = here[:len(here) - (node.level - 1)]
                    source = ".".join(base + ([node.module] if node.module else []))
                else:
                    source = node.module or ""
                targets = []
                for alias in node.names:  # `from pkg import submodule` imports the submodule
                    sub = f"{source}.{alias.name}"
                    targets.append(sub if sub in modules else source)
            for target in targets:
                while target and target not in modules:  # `import a.b.c` -> the deepest known
                    target = target.rpartition(".")[0]
                if target and target != module and target.split(".")[0] == name:
                    edges.add((module, target))
    return edges


def layer_of(module: str, layers=LAYERS) -> int:
    rest = module.split(".", 1)[1] if "." in module else ""
    head = rest.split(".")[0]
    for i, names in enumerate(layers):
        if head in names:
            return i
    raise AssertionError(f"module {module!r} belongs to no layer: add it to LAYERS")


def upward(edges, layers=LAYERS, allowed=frozenset()):
    return sorted((a, b) for a, b in edges
                  if layer_of(b, layers) > layer_of(a, layers) and (a, b) not in allowed)


def cycles(edges) -> list[list[str]]:
    """One cycle per strongly connected component of more than one module (Tarjan 1972)."""
    graph: dict[str, list[str]] = {}
    for a, b in sorted(edges):
        graph.setdefault(a, []).append(b)
        graph.setdefault(b, [])
    index, low, on_stack, stack, found = {}, {}, set(), [], []

    def visit(v):
        index[v] = low[v] = len(index)
        stack.append(v)
        on_stack.add(v)
        for w in graph[v]:
            if w not in index:
                visit(w)
                low[v] = min(low[v], low[w])
            elif w in on_stack:
                low[v] = min(low[v], index[w])
        if low[v] == index[v]:
            component = []
            while True:
                w = stack.pop()
                on_stack.discard(w)
                component.append(w)
                if w == v:
                    break
            if len(component) > 1:
                found.append(sorted(component))

    for v in graph:
        if v not in index:
            visit(v)
    return found


def test_no_upward_import():
    edges = import_edges(PACKAGE, "stratagap")
    assert len(edges) > 60  # the walk sees the package's imports at all
    assert upward(edges, allowed=ALLOWED_UPWARD) == []


def test_allowed_upward_imports_are_still_needed():
    edges = import_edges(PACKAGE, "stratagap")
    assert ALLOWED_UPWARD <= edges, "drop an allowance that no import uses any more"


def test_no_import_cycle():
    edges = import_edges(PACKAGE, "stratagap") - ALLOWED_UPWARD
    assert cycles(edges) == []


def test_every_module_has_a_layer():
    for module in modules_of(PACKAGE, "stratagap"):
        layer_of(module)


def test_at_most_a_dozen_modules_at_the_top():
    top = [p for p in PACKAGE.glob("*.py")]
    assert len(top) <= 12, sorted(p.name for p in top)


def _write(root: Path, files: dict[str, str]):
    for rel, text in files.items():
        path = root / rel
        path.parent.mkdir(parents=True, exist_ok=True)
        path.write_text(textwrap.dedent(text), encoding="utf-8")


def test_checker_finds_a_cycle_and_an_upward_import(tmp_path):
    """The checker itself, on a small fixture package with a cycle hidden in a function."""
    root = tmp_path / "toy"
    _write(root, {
        "__init__.py": "",
        "low/__init__.py": "",
        "low/a.py": "from . import b\n",
        "low/b.py": "def f():\n    from .c import g\n    return g\n",
        "low/c.py": "from ..low import a\n",
        "high.py": "from .low import a\n",
        "typed.py": ("from typing import TYPE_CHECKING\nif TYPE_CHECKING:\n"
                     "    from .high import x\n"),
    })
    edges = import_edges(root, "toy")
    assert {("toy.low.a", "toy.low.b"), ("toy.low.b", "toy.low.c"), ("toy.low.c", "toy.low.a"),
            ("toy.high", "toy.low.a")} <= edges
    assert ("toy.typed", "toy.high") not in edges  # TYPE_CHECKING imports do not count
    assert cycles(edges) == [["toy.low.a", "toy.low.b", "toy.low.c"]]
    layers = [("low",), ("high", "typed", "")]
    assert upward(edges, layers) == []
    _write(root, {"low/d.py": "import toy.high\n"})
    assert upward(import_edges(root, "toy"), layers) == [("toy.low.d", "toy.high")]
    with pytest.raises(AssertionError, match="no layer"):
        layer_of("toy.elsewhere", layers)


def test_old_paths_warn_and_give_the_moved_module():
    import importlib
    import sys

    for old, new in stratagap.MOVED.items():
        sys.modules.pop(f"stratagap.{old}", None)
        with pytest.warns(DeprecationWarning, match=f"stratagap.{new}"):
            module = importlib.import_module(f"stratagap.{old}")
        assert module is importlib.import_module(f"stratagap.{new}")
    sys.modules.pop("stratagap.report.html", None)
    with pytest.warns(DeprecationWarning):
        from stratagap.report.html import render_html  # noqa: F401  (a submodule of an old path)


def test_old_path_leaves_the_new_package_intact():
    """Importing an old path must not turn the moved package into a plain module."""
    import importlib
    import sys

    sys.modules.pop("stratagap.report", None)
    with pytest.warns(DeprecationWarning):
        importlib.import_module("stratagap.report")
    real = importlib.import_module("stratagap.render.report")
    assert real.__spec__.name == "stratagap.render.report"
    assert real.__spec__.submodule_search_locations is not None
    importlib.import_module("stratagap.render.report.baseline")  # still a package

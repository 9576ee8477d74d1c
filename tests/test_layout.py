"""The package's layout cannot rot: every import runs down the pipeline, and no modules import each other in a circle.

Reads every ``import`` in ``hierchoice/`` (module level and inside functions) with :mod:`ast`, so lazy imports
count too. The floors are the pipeline's stages (DEVELOPERS.md, "Architecture"); a module may import modules on
lower floors and modules of its own subpackage, and the module graph has no cycle.
"""

from __future__ import annotations

import ast
from pathlib import Path

import pytest

PACKAGE = Path(__file__).resolve().parents[1] / "hierchoice"

#: floor of each top-level part of the package; higher floors may import lower ones only
FLOORS = {
    "exceptions": 0, "_version": 0,
    "_io": 1, "_records": 1, "_display": 1, "_backend": 1, "_args": 1, "_toml": 1,
    "spec": 2,
    "data": 3,
    "model": 4,
    "simulate": 5,
    "inference": 5,
    "diagnostics": 6, "analysis": 6,
    "validation": 7, "report": 7,
    "demo": 8,
    "cli": 9, "__main__": 10, "__init__": 10,
}


def _module_name(path: Path) -> str:
    rel = path.relative_to(PACKAGE.parent).with_suffix("")
    parts = list(rel.parts)
    if parts[-1] == "__init__":
        parts = parts[:-1]
    return ".".join(parts)


def _imports(path: Path) -> set[str]:
    """Absolute names of the hierchoice modules (or packages) that ``path`` imports."""
    tree = ast.parse(path.read_text(encoding="utf-8"))
    here = _module_name(path).split(".")
    package = here if path.name == "__init__.py" else here[:-1]
    found: set[str] = set()
    for node in ast.walk(tree):
        if isinstance(node, ast.ImportFrom):
            if node.level:
                base = package[: len(package) - (node.level - 1)]
                target = base + (node.module.split(".") if node.module else [])
            elif node.module and node.module.split(".")[0] == "hierchoice":
                target = node.module.split(".")
            else:
                continue
            for alias in node.names:  # "from . import x" may name a submodule
                candidate = ".".join([*target, alias.name])
                found.add(candidate if _exists(candidate) else ".".join(target))
        elif isinstance(node, ast.Import):
            found.update(a.name for a in node.names if a.name.split(".")[0] == "hierchoice")
    return {f for f in found if f != "hierchoice" or path.name != "__init__.py"}


def _exists(dotted: str) -> bool:
    rel = Path(*dotted.split("."))
    return (PACKAGE.parent / rel.with_suffix(".py")).exists() or (PACKAGE.parent / rel / "__init__.py").exists()


def _part(dotted: str) -> str:
    parts = dotted.split(".")
    return parts[1] if len(parts) > 1 else "__init__"


def _graph() -> dict[str, set[str]]:
    return {_module_name(p): _imports(p) for p in sorted(PACKAGE.rglob("*.py"))}


def test_every_part_of_the_package_has_a_floor():
    parts = {_part(m) for m in _graph()}
    assert parts <= set(FLOORS), f"give these a floor in FLOORS: {sorted(parts - set(FLOORS))}"


def test_imports_run_down_the_pipeline():
    upward = []
    for module, targets in _graph().items():
        for target in targets:
            a, b = _part(module), _part(target)
            if a != b and FLOORS[b] >= FLOORS[a]:
                upward.append(f"{module} -> {target}")
    assert not upward, "imports that run up or sideways:\n" + "\n".join(sorted(upward))


def _cycles(graph: dict[str, set[str]]) -> list[list[str]]:
    """Strongly connected components with more than one module (Tarjan 1972)."""
    index: dict[str, int] = {}
    low: dict[str, int] = {}
    stack: list[str] = []
    on: set[str] = set()
    out: list[list[str]] = []

    def visit(v: str) -> None:
        index[v] = low[v] = len(index)
        stack.append(v)
        on.add(v)
        for w in graph.get(v, ()):
            if w not in graph:
                continue
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
            if len(comp) > 1:
                out.append(sorted(comp))

    for v in graph:
        if v not in index:
            visit(v)
    return out


def test_no_import_cycles():
    graph = _graph()
    # a subpackage's __init__ re-exports its modules: the package -> module edges are not cycles by themselves
    edges = {m: {t for t in ts if not (t.startswith(m + ".") and m.count(".") == 1)} for m, ts in graph.items()}
    assert _cycles(edges) == []


def test_the_cycle_finder_finds_a_cycle():
    # negative control: the check above can fail
    assert _cycles({"a": {"b"}, "b": {"c"}, "c": {"a"}, "d": {"a"}}) == [["a", "b", "c"]]


@pytest.mark.parametrize("path", sorted(PACKAGE.rglob("*.py")), ids=lambda p: str(p.relative_to(PACKAGE)))
def test_modules_stay_small(path):
    # the layout's target: no module over ~600 lines, so that one concept is one short file
    n = len(path.read_text(encoding="utf-8").splitlines())
    assert n <= 650, f"{path.relative_to(PACKAGE)} has {n} lines: split it by concern"

"""The package's floors, read from the source (common practice, no source): each subpackage
imports only itself and the floors below it, the report reads analysis results and never
calls the numerical core, and no module imports itself back through others.

Floors, bottom up: the leaves (``_version``, ``_threads``, ``_text``, ``errors``); ``fpca``
(pure numerics); ``inputs`` (spec, readers, data checks, loader); ``analysis``; ``report``;
``runs``; and the entry points on top (``api``, ``cli``, the package itself, ``syscheck``).
Imports under ``if TYPE_CHECKING:`` are annotations only and count for nothing at run time;
they may reach a lower floor but never a higher one.
"""

from __future__ import annotations

import ast
from pathlib import Path

import pytest

PACKAGE = Path(__file__).resolve().parents[1] / "reportgen"
FLOORS = {
    "_version": 0,
    "_threads": 0,
    "_text": 0,
    "errors": 0,
    "fpca": 1,
    "inputs": 2,
    "analysis": 3,
    "report": 4,
    "runs": 5,
    "api": 6,
    "cli": 6,
    "__init__": 6,
    "syscheck": 6,
}
# The report may not call the numerics at run time: it reads finished results.
FORBIDDEN = {("report", "fpca")}


def _module(path: Path, package: Path) -> str:
    parts = list(path.relative_to(package.parent).with_suffix("").parts)
    if parts[-1] == "__init__":
        parts = parts[:-1]
    return ".".join(parts)


def _imports(path: Path, package: Path) -> list[tuple[str, bool, int]]:
    """(imported module, only for annotations, line) of every import in the file,
    relative imports resolved; inside functions too (imports made on first use)."""
    tree = ast.parse(path.read_text("utf-8"))
    here = _module(path, package)
    parent = here if path.name == "__init__.py" else here.rsplit(".", 1)[0]
    typing_only: set[int] = set()
    for node in ast.walk(tree):
        if isinstance(node, ast.If) and "TYPE_CHECKING" in ast.unparse(node.test):
            for inner in node.body:
                typing_only.update(id(n) for n in ast.walk(inner))
    out = []
    for node in ast.walk(tree):
        names: list[str] = []
        if isinstance(node, ast.Import):
            names = [a.name for a in node.names]
        elif isinstance(node, ast.ImportFrom):
            if node.level:
                base = parent.split(".")[: len(parent.split(".")) - node.level + 1]
                target = ".".join(base + ([node.module] if node.module else []))
            else:
                target = node.module or ""
            names = [target] + [f"{target}.{a.name}" for a in node.names]
        for name in names:
            if name == "reportgen" or name.startswith("reportgen."):
                out.append((name, id(node) in typing_only, node.lineno))
    return out


def _floor(module: str) -> tuple[str, int] | None:
    parts = module.split(".")
    if len(parts) < 2:
        return "__init__", FLOORS["__init__"]
    top = parts[1]
    return (top, FLOORS[top]) if top in FLOORS else None


def violations(path: Path, package: Path = PACKAGE) -> list[str]:
    """Every import of the file at ``path`` that breaks the floors."""
    here = _module(path, package)
    mine = _floor(here)
    if mine is None:
        return [f"{here} sits on no floor"]
    out = []
    for name, typing_only, line in _imports(path, package):
        theirs = _floor(name)
        if theirs is None:  # "from reportgen import x" names a module below: checked there
            continue
        if theirs[1] > mine[1]:
            out.append(
                f"{here} (floor {mine[0]}) imports {name} (floor {theirs[0]}) at line {line}"
            )
        elif not typing_only and (mine[0], theirs[0]) in FORBIDDEN:
            out.append(
                f"{here} calls into {theirs[0]} at line {line}: the report reads "
                "finished results from the analysis"
            )
    return out


def _modules(package: Path = PACKAGE) -> list[Path]:
    return sorted(package.rglob("*.py"))


@pytest.mark.parametrize("path", _modules(), ids=lambda p: _module(p, PACKAGE))
def test_no_module_imports_a_floor_above_its_own(path: Path) -> None:
    assert violations(path) == []


def test_the_rule_fails_on_a_violation(tmp_path: Path) -> None:
    # A rule that cannot fail checks nothing: a numerical module that imports the run
    # writer, a report module that calls the numerics at run time, and the same call made
    # for annotations only (allowed).
    package = tmp_path / "reportgen"
    for folder in ("fpca", "report"):
        (package / folder).mkdir(parents=True)
    (package / "fpca" / "bad.py").write_text("def f():\n    from ..runs.writer import run_spec\n")
    (package / "report" / "calls.py").write_text("from ..fpca.fit import fit_parts\n")
    (package / "report" / "types.py").write_text(
        "from typing import TYPE_CHECKING\nif TYPE_CHECKING:\n"
        "    from ..fpca.result import FPCAFit\n"
    )
    assert violations(package / "fpca" / "bad.py", package) == [
        "reportgen.fpca.bad (floor fpca) imports reportgen.runs.writer (floor runs) at line 2",
        "reportgen.fpca.bad (floor fpca) imports reportgen.runs.writer.run_spec (floor runs) "
        "at line 2",
    ]
    assert len(violations(package / "report" / "calls.py", package)) == 2
    assert violations(package / "report" / "types.py", package) == []


def test_no_import_cycle() -> None:
    """Between modules, counting every run-time import (those made on first use too)."""
    known = {_module(p, PACKAGE) for p in _modules()}
    graph: dict[str, set[str]] = {}
    for path in _modules():
        edges = set()
        for name, typing_only, _ in _imports(path, PACKAGE):
            if typing_only:
                continue
            while name and name not in known:
                name = name.rsplit(".", 1)[0] if "." in name else ""
            if name and name != _module(path, PACKAGE) and not _is_package(name):
                edges.add(name)  # a package's __init__ runs before its modules: not a cycle
        graph[_module(path, PACKAGE)] = edges
    state: dict[str, int] = {}

    def visit(node: str, stack: list[str]) -> None:
        state[node] = 1
        for nxt in sorted(graph.get(node, ())):
            if state.get(nxt) == 1:
                raise AssertionError(
                    "import cycle: " + " -> ".join([*stack[stack.index(nxt) :], nxt])
                )
            if state.get(nxt) is None:
                visit(nxt, [*stack, nxt])
        state[node] = 2

    for node in sorted(graph):
        if state.get(node) is None:
            visit(node, [node])


def _is_package(module: str) -> bool:
    return (PACKAGE.parent / module.replace(".", "/") / "__init__.py").is_file()

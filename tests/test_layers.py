"""The package's layers, checked on the source: imports go one way only.

hiddenlens/_core       systems, traces, recording, step Jacobians, options, results, registry
hiddenlens/_plotting   matplotlib only: draws what a result holds, imports no other layer
hiddenlens/_analyses   the analyses, one module each, and what runs them
hiddenlens/_training   the monitor, checkpoint timelines and sweeps
hiddenlens/_faces      the report, the command line and the notebook widgets

A module may import from its own layer and the layers below it (in the order above, with
_plotting reached only from inside a function, so that importing an analysis never imports
matplotlib); across layers it imports public names only (no leading underscore).
"""

from __future__ import annotations

import ast
from pathlib import Path

import pytest

PACKAGE = Path(__file__).resolve().parents[1] / "hiddenlens"
ORDER = ["_core", "_analyses", "_training", "_faces"]


def _modules():
    for path in sorted(PACKAGE.rglob("*.py")):
        parts = list(path.relative_to(PACKAGE).with_suffix("").parts)
        yield path, parts


def _layer(parts):
    return parts[0] if parts and parts[0] in (*ORDER, "_plotting") else None


def _imports(path, parts):
    """(target parts, imported names, line, inside a function) for each relative import."""
    tree = ast.parse(path.read_text(encoding="utf-8"))
    package = parts[:-1] if parts[-1] != "__init__" else parts[:-1]
    if parts[-1] == "__init__":
        package = parts[:-1]
    defs = (ast.FunctionDef, ast.AsyncFunctionDef)
    functions = {id(n) for f in ast.walk(tree) if isinstance(f, defs) for n in ast.walk(f)}
    for node in ast.walk(tree):
        if isinstance(node, ast.ImportFrom) and node.level:
            base = package[:len(package) - (node.level - 1)]
            target = base + (node.module.split(".") if node.module else [])
            names = [a.name for a in node.names]
            if node.module is None:  # from . import module
                for name in names:
                    yield target + [name], [], node.lineno, id(node) in functions
            else:
                yield target, names, node.lineno, id(node) in functions


def _violations():
    found = []
    for path, parts in _modules():
        mine = _layer(parts)
        if mine is None:
            continue
        for target, names, line, lazy in _imports(path, parts):
            theirs = _layer(target)
            where = f"{path.relative_to(PACKAGE.parent)}:{line}"
            if theirs is None or theirs == mine:
                continue
            if mine == "_plotting":
                found.append(f"{where}: the plotting layer imports {'.'.join(target)}")
                continue
            if theirs == "_plotting":
                if not lazy and mine != "_faces":
                    found.append(f"{where}: matplotlib layer imported at module level")
            elif ORDER.index(theirs) > ORDER.index(mine):
                found.append(f"{where}: {mine} imports the higher layer {'.'.join(target)}")
            private = [n for n in names if n.startswith("_")]
            if private:
                found.append(f"{where}: private {private} imported across layers from "
                             f"{'.'.join(target)}")
    return found


def test_every_module_sits_in_a_layer():
    # common practice: nothing but the public entry points at the top of the package
    top = sorted(p.name for p in PACKAGE.glob("*.py"))
    assert top == ["__init__.py", "__main__.py", "_version.py", "cli.py", "examples.py"]
    for layer in (*ORDER, "_plotting"):
        assert (PACKAGE / layer / "__init__.py").is_file()


def test_imports_go_one_way_and_cross_layers_by_public_names_only():
    assert _violations() == []


@pytest.mark.parametrize("layer", ["_core", "_analyses", "_training"])
def test_lower_layers_never_import_the_widgets(layer):
    for path in (PACKAGE / layer).rglob("*.py"):
        text = path.read_text(encoding="utf-8")
        assert "ipywidgets" not in text, path

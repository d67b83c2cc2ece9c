"""Packaging: one top-level package, the example scenario inside it, dependencies declared."""

import ast
import sys
from pathlib import Path

import pytest

ROOT = Path(__file__).resolve().parents[1]

if sys.version_info >= (3, 11):
    import tomllib
else:  # pragma: no cover
    tomllib = pytest.importorskip("tomli")


def _project():
    return tomllib.loads((ROOT / "pyproject.toml").read_text())


def test_every_subpackage_is_listed_and_examples_are_mapped():
    setup = _project()["tool"]["setuptools"]
    found = {".".join(p.parent.relative_to(ROOT).parts)
             for p in (ROOT / "hiddenlens").rglob("__init__.py")}
    assert found | {"hiddenlens.examples"} == set(setup["packages"])
    assert {p.split(".")[0] for p in setup["packages"]} == {"hiddenlens"}
    assert setup["package-dir"] == {"hiddenlens.examples": "example_models"}
    data = setup["package-data"]["hiddenlens.examples"]
    assert "weights/*.pt" in data and "data/*.npz" in data


def test_imported_third_party_modules_are_declared():
    # every top-level import of the package (outside the standard library) is a dependency or
    # an optional extra (imported lazily where it is used)
    project = _project()["project"]
    listed = list(project["dependencies"])
    for extra in project.get("optional-dependencies", {}).values():
        listed += extra
    deps = {d.split(">")[0].split("=")[0].split("[")[0].strip().lower().replace("-", "_")
            for d in listed}
    # module -> distribution (cycler ships with matplotlib, pytorch_lightning with lightning)
    names = {"sklearn": "scikit_learn", "mpl_toolkits": "matplotlib", "cycler": "matplotlib",
             "pytorch_lightning": "lightning"}
    imported = set()
    for path in (ROOT / "hiddenlens").rglob("*.py"):
        for node in ast.walk(ast.parse(path.read_text())):
            if isinstance(node, ast.Import):
                imported |= {a.name.split(".")[0] for a in node.names}
            elif isinstance(node, ast.ImportFrom) and node.level == 0 and node.module:
                imported.add(node.module.split(".")[0])
    third = {m for m in imported if m not in sys.stdlib_module_names and m != "hiddenlens"}
    assert {names.get(m, m) for m in third} <= deps


def test_examples_import_under_the_package_name():
    import hiddenlens.examples as ex
    from hiddenlens.examples import sorting_line

    assert ex.__name__ == "hiddenlens.examples"
    assert ex.list_runs(task=sorting_line) and all(
        ex.RUNS[n].task == sorting_line.__name__ for n in ex.list_runs(task=sorting_line))
    assert all(r.factory.startswith("hiddenlens.examples.") for r in ex.RUNS.values())

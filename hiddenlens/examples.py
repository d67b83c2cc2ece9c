"""``hiddenlens.examples`` in a source checkout used through ``PYTHONPATH``.

An installed hiddenlens (``pip install .`` or ``pip install -e .``) has the package
``hiddenlens.examples``, mapped from the repository's ``example_models/`` folder
(``pyproject.toml``, ``[tool.setuptools.package-dir]``); a package wins over a module of the
same name, so this file is then never imported. Without an installation, it loads
``example_models/`` under the name ``hiddenlens.examples``, submodules included.
"""

from __future__ import annotations

import importlib.util
import sys
from pathlib import Path

_SOURCE = Path(__file__).resolve().parent.parent / "example_models"


def _load() -> None:
    init = _SOURCE / "__init__.py"
    if not init.is_file():
        raise ImportError(f"hiddenlens.examples is not installed and {_SOURCE} does not exist; "
                          "install hiddenlens with pip to get the example models")
    spec = importlib.util.spec_from_file_location(
        __name__, init, submodule_search_locations=[str(_SOURCE)])
    module = importlib.util.module_from_spec(spec)
    sys.modules[__name__] = module  # submodules resolve through module.__path__
    spec.loader.exec_module(module)


_load()

"""Notebook widgets: :func:`explore` one model, :func:`compare` several runs.

Built from standard ipywidgets 8 controls and matplotlib figures rendered to PNG (no custom
front-end code), so they work in JupyterLab, Notebook 7 and VS Code. Importing this package
imports ipywidgets and matplotlib; the computation core never does.
"""

from __future__ import annotations

from ._board import StaticView
from ._comparison import Comparison, compare
from ._explore import Explorer, explore

__all__ = ["Comparison", "Explorer", "StaticView", "compare", "explore"]

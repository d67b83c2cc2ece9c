"""Notebook widgets: :func:`explore` one model, :func:`compare` several runs.

Built from standard ipywidgets 8 controls and matplotlib figures rendered to PNG (no custom
front-end code), so they work in JupyterLab, Notebook 7 and VS Code. Importing this package
imports ipywidgets and matplotlib; the computation core never does.
"""

from __future__ import annotations

from .._faces.widgets.board import StaticView
from .._faces.widgets.comparison import Comparison, compare
from .._faces.widgets.explore import Explorer, explore

__all__ = ["Comparison", "Explorer", "StaticView", "compare", "explore"]

"""The shared entry points of the faces, kept under their 0.1 names.

The registry lives in :mod:`._registry`, the runner in :mod:`._runner` and the key figures in
:mod:`._figures`; this module re-exports them so that existing imports keep working. The
constants below describe the built-in analyses only: faces read the registry itself
(:func:`hiddenlens.analyses`, :func:`hiddenlens._core.registry.analysis_spec`).
"""

from __future__ import annotations

from collections.abc import Callable
from typing import Any

from .._analyses.figures import (
    array_summaries,
    describe_inputs,
    format_figure,
    key_figures,
    summary_sentence,
)
from .._analyses.runner import AnalysisResults, run_analyses
from .._core.registry import (
    analyses,
    analysis_spec,
    available_analyses,
    nanmedian,
    register_analysis,
    registered,
    unregister_analysis,
)

__all__ = [
    "ANALYSES",
    "AnalysisResults",
    "FIGURES",
    "CAUTIONS",
    "TITLES",
    "analyses",
    "analysis_function",
    "available_analyses",
    "register_analysis",
    "unregister_analysis",
    "run_analyses",
    "key_figures",
    "summary_sentence",
    "array_summaries",
    "describe_inputs",
    "format_figure",
]

_BUILTIN = registered()  # at import: the built-in analyses, before any user registers more

#: Names of the built-in analyses, in the order they are run and shown.
ANALYSES: tuple[str, ...] = tuple(s.name for s in _BUILTIN)

#: Short titles of the built-in analyses, for headings and legends.
TITLES: dict[str, str] = {s.name: s.title for s in _BUILTIN}

#: How to read each built-in analysis' numbers with care; shown beside them in reports.
CAUTIONS: dict[str, str] = {s.name: s.caution for s in _BUILTIN}

#: Built-in key figure -> (label, unit or "", analysis).
FIGURES: dict[str, tuple[str, str, str]] = {
    k: (f.label, f.unit, s.name) for s in _BUILTIN for k, f in s.figures.items()}

_nanmedian = nanmedian


def analysis_function(name: str) -> Callable[..., Any]:
    """The public function behind analysis ``name`` (e.g. ``"lyapunov"`` -> lyapunov_spectrum)."""
    return analysis_spec(name).load()




"""The analysis registry: one :class:`AnalysisSpec` per analysis, in display order.

Every face (widgets, report, comparison table, command line) loops over this registry, so an
analysis registered with :func:`register_analysis` shows up in all of them. Built-in analyses
name their function as ``"module:function"`` and are imported on first use, so that
``import hiddenlens`` stays light.
"""

from __future__ import annotations

import contextlib
import functools
import importlib
import importlib.util
import inspect
import math
import threading
import warnings
from collections.abc import Callable, Iterator, Mapping, Sequence
from dataclasses import dataclass, field
from typing import Any

import numpy as np

__all__ = [
    "AnalysisSpec",
    "Drawing",
    "Figure",
    "STABILITY_CLASSES",
    "analyses",
    "analysis_spec",
    "available_analyses",
    "check_names",
    "register_analysis",
    "registered",
    "unregister_analysis",
]

#: Stability classes of fixed points, in the order they are counted and shown.
STABILITY_CLASSES: tuple[str, ...] = ("stable", "saddle", "unstable", "marginal")

FigureValue = float | int | str


@dataclass(frozen=True)
class Figure:
    """How a key figure is shown: ``label`` and ``unit`` ("" for none)."""

    label: str
    unit: str = ""


@dataclass(frozen=True)
class Drawing:
    """One figure of a result in a report: ``draw(ax)`` on Axes of ``projection``."""

    caption: str
    draw: Callable[[Any], Any]
    projection: str | None = None


def _no_figures(result: Any) -> dict[str, FigureValue]:
    return {}


def _no_phrases(figures: Mapping[str, Any]) -> list[str]:
    return []


def _no_budget(system: Any, trace: Any, seed: int) -> dict[str, Any]:
    return {}


def _plain_drawings(result: Any, others: Mapping[str, Any], *, extras: bool = True
                    ) -> list[Drawing]:
    return [Drawing("", lambda ax: result.plot(ax=ax))]


def _no_setting(results: Mapping[str, Any]) -> str:
    return ""


@dataclass(frozen=True, eq=False)
class AnalysisSpec:
    """Everything the faces need to know about one analysis.

    Attributes
    ----------
    name : str
        Registry key, e.g. ``"lyapunov"``; also the key of its result in ``run_analyses``.
    title : str
        Heading of its report section, tab and overlay plot.
    function : callable or str
        ``function(system, trace, **options) -> result``, or ``"module:function"`` naming it
        (imported on first use). The result has ``.plot(ax=None)`` and ``.to_frame()``.
    key_figures : callable
        ``key_figures(result) -> dict`` of figure name -> float, int or str.
    figures : Mapping[str, Figure]
        Label and unit of each key figure, in the order they are shown.
    caution : str
        How to read the numbers with care (shown beside them in the report and the tab).
    budget : callable
        ``budget(system, trace, seed) -> dict``: default options for an interactive look or a
        report (seconds, not minutes). Options the function does not accept are dropped.
    phrases : callable
        ``phrases(figures) -> list of str``: the key figures in plain words, for the summary
        sentence; ``figures`` holds the figures of every analysis of the run.
    arrays : callable or None
        ``arrays(result) -> dict``: the main arrays reduced to short JSON-ready lists.
    overlay : callable or None
        ``overlay(runs, ax)`` draws one result per run on one Axes; ``runs`` is a list of
        ``(run name, result)`` pairs. None: the comparison draws each run's own ``.plot``.
    needs : tuple of str
        Context keys the analysis requires (e.g. ``("targets",)``); they are passed as
        keyword options, and the analysis is skipped with the reason when one is absent.
    uses : tuple of str
        Context keys the analysis takes when they are given (e.g. ``("onsets",)``).
    drawings : callable
        ``drawings(result, others, extras=True) -> list of Drawing``: the report figures of
        one run; ``others`` holds the run's other results. Default: ``result.plot(ax=ax)``.
    setting : callable
        ``setting(results) -> str``: how the analysis was set up, in words, for a mapping run
        name -> result ('' when there is nothing to say).
    adapter : callable or None
        ``adapter(function, system, trace, **options)`` for a function of another call form.
    """

    name: str
    title: str
    function: Callable[..., Any] | str
    key_figures: Callable[[Any], Mapping[str, FigureValue]] = _no_figures
    figures: Mapping[str, Figure] = field(default_factory=dict)
    caution: str = ""
    budget: Callable[[Any, Any, int], Mapping[str, Any]] = _no_budget
    phrases: Callable[[Mapping[str, Any]], list[str]] = _no_phrases
    arrays: Callable[[Any], Mapping[str, Any]] | None = None
    overlay: Callable[[Sequence[tuple[str, Any]], Any], None] | None = None
    needs: tuple[str, ...] = ()
    uses: tuple[str, ...] = ()
    drawings: Callable[..., list[Drawing]] = _plain_drawings
    setting: Callable[[Mapping[str, Any]], str] = _no_setting
    adapter: Callable[..., Any] | None = None

    def __post_init__(self) -> None:
        _check_spec(self.name, self.title, self.function)

    @property
    def module(self) -> str | None:
        """The module named by a ``"module:function"`` function (None for a callable)."""
        return self.function.partition(":")[0] if isinstance(self.function, str) else None

    def available(self) -> bool:
        """Whether the function can be imported in this installation."""
        module = self.module
        return module is None or importlib.util.find_spec(module) is not None

    def load(self) -> Callable[..., Any]:
        """The function, called as ``function(system, trace, **options)``."""
        if callable(self.function):
            return self.function
        if not self.available():
            raise ValueError(f"the {self.name!r} analysis ({self.function}) is not available "
                             f"in this installation of hiddenlens; choose among "
                             f"{', '.join(available_analyses())}")
        module, _, attr = self.function.partition(":")
        return functools.reduce(getattr, attr.split("."), importlib.import_module(module))

    def __call__(self, system: Any, trace: Any, **options: Any) -> Any:
        """Run the analysis: ``function(system, trace, **options)``."""
        fn = self.load()
        if self.adapter is not None:
            return self.adapter(fn, system, trace, **options)
        return fn(system, trace, **options)

    def accepted(self) -> tuple[set[str], bool]:
        """Keyword names the function takes, and whether it takes any (``**options``)."""
        params = inspect.signature(self.load()).parameters.values()
        names = {p.name for p in params if p.kind in (p.KEYWORD_ONLY, p.POSITIONAL_OR_KEYWORD)}
        return names, any(p.kind == p.VAR_KEYWORD for p in params)


_LOCK = threading.Lock()
_SPECS: dict[str, AnalysisSpec] = {}
# The built-in specs live with the analyses (a higher layer); they register themselves when that
# module is imported, which the registry does by name on first use.
_BUILTINS = "hiddenlens._analyses.builtin"
_builtins_loaded = False


def wraps_analysis(wrapped: Callable[..., Any], *extra: str) -> Callable[[Callable], Callable]:
    """Mark ``function(system, trace, **options)`` as the analysis form of ``wrapped``.

    The form gets ``wrapped``'s options (plus the keyword-only ``extra`` names: context keys, or
    options an adapter consumes) as its signature, so the runner refuses an unknown option by
    name and messages name the function users know.
    """
    def mark(form: Callable) -> Callable:
        params = [p for p in inspect.signature(wrapped).parameters.values()
                  if p.kind is not p.VAR_POSITIONAL]
        have = {p.name for p in params}
        params += [inspect.Parameter(n, inspect.Parameter.KEYWORD_ONLY, default=None)
                   for n in extra if n not in have]
        form.__signature__ = inspect.Signature(params)
        form.__wrapped__ = wrapped
        return form

    return mark


def _ensure_builtins() -> None:
    global _builtins_loaded
    if not _builtins_loaded:
        importlib.import_module(_BUILTINS)  # the import lock makes this happen once
        _builtins_loaded = True


def registered() -> tuple[AnalysisSpec, ...]:
    """Every spec, in display order (built-ins first, then registration order)."""
    _ensure_builtins()
    with _LOCK:
        return tuple(_SPECS.values())


def analyses() -> tuple[str, ...]:
    """Names of the registered analyses, in display order.

    Examples
    --------
    >>> import hiddenlens
    >>> hiddenlens.analyses()[:3]
    ('spectra', 'gradient_flow', 'lyapunov')
    """
    return tuple(s.name for s in registered())


def available_analyses() -> tuple[str, ...]:
    """The registered analyses whose implementation is present in this installation."""
    return tuple(s.name for s in registered() if s.available())


def analysis_spec(name: str) -> AnalysisSpec:
    """The spec of analysis ``name``; ``ValueError`` naming the choices if there is none."""
    _ensure_builtins()
    with _LOCK:
        spec = _SPECS.get(name)
    if spec is None:
        raise ValueError(f"unknown analysis {name!r}; expected one of {', '.join(analyses())}")
    return spec


def check_names(names: Any, what: str = "analysis") -> list[str]:
    """``names`` as a list, each checked against the registry."""
    known = analyses()
    out = []
    for n in names:
        if n not in known:
            raise ValueError(f"unknown {what} {n!r}; expected one of {', '.join(known)}")
        out.append(n)
    return out


def add_spec(spec: AnalysisSpec, *, replace: bool = False) -> AnalysisSpec:
    with _LOCK:
        if spec.name in _SPECS and not replace:
            raise ValueError(f"an analysis named {spec.name!r} is already registered; pass "
                             "replace=True or call unregister_analysis first")
        _SPECS[spec.name] = spec
    return spec


def register_analysis(
    name: str,
    function: Callable[..., Any] | str,
    *,
    title: str,
    key_figures: Callable[[Any], Mapping[str, FigureValue]] | None = None,
    caution: str = "",
    figures: Mapping[str, Figure | tuple[str, str] | str] | None = None,
    budget: Callable[[Any, Any, int], Mapping[str, Any]] | None = None,
    phrases: Callable[[Mapping[str, Any]], list[str]] | None = None,
    arrays: Callable[[Any], Mapping[str, Any]] | None = None,
    overlay: Callable[[Sequence[tuple[str, Any]], Any], None] | None = None,
    needs: Sequence[str] = (),
    replace: bool = False,
) -> AnalysisSpec:
    """Add an analysis to every face: widget tabs, report sections, comparison rows, CLI.

    Parameters
    ----------
    name : str
        A new name (letters, digits and underscores), the key of its results.
    function : callable or "module:function"
        Called as ``function(system, trace, **options)`` with a
        :class:`~hiddenlens.RecurrentSystem` and the :class:`~hiddenlens.Trace` recorded on
        the inputs; returns a result with ``.plot(ax=None)`` and ``.to_frame()``.
    title : str
        Heading of its tab and report section.
    key_figures : callable, optional
        ``key_figures(result) -> dict`` of figure name -> float (or int, str); these become
        rows of ``compare_runs(...).table`` and of the report's key-figure table.
    caution : str, optional
        How to read the numbers with care; shown in the report and the tab.
    figures : mapping, optional
        Figure name -> ``Figure(label, unit)`` or a ``(label, unit)`` pair or a label; default:
        the figure names as labels.
    budget, phrases, arrays, overlay, needs
        See :class:`AnalysisSpec`.
    replace : bool, default False
        Replace an analysis of the same name instead of refusing.

    Returns
    -------
    AnalysisSpec
        The spec added; :func:`unregister_analysis` removes it again.
    """
    _check_spec(name, title, function)
    if isinstance(needs, str):
        needs = (needs,)
    labels = {k: _as_figure(k, v) for k, v in (figures or {}).items()}
    spec = AnalysisSpec(
        name=name, title=title, function=function,
        key_figures=_labelled(key_figures, labels) if key_figures else _no_figures,
        figures=labels, caution=str(caution), budget=budget or _no_budget,
        phrases=phrases or _no_phrases, arrays=arrays, overlay=overlay, needs=tuple(needs))
    _ensure_builtins()  # built-ins first in display order
    return add_spec(spec, replace=replace)


def _check_spec(name: Any, title: Any, function: Any) -> None:
    """The name, title and function of a spec, refused in the one message form."""
    if not isinstance(name, str) or not name.isidentifier():
        raise ValueError(f"name must be a Python identifier such as 'my_analysis', got "
                         f"{name!r}")
    if not (callable(function) or (isinstance(function, str) and ":" in function)):
        raise TypeError("function must be callable as function(system, trace, **options) or "
                        f"a 'module:function' string, got {type(function).__name__}")
    if not isinstance(title, str) or not title:
        raise ValueError("title must be a non-empty str, e.g. title='My analysis'")


def _as_figure(key: str, value: Figure | tuple[str, str] | str) -> Figure:
    if isinstance(value, Figure):
        return value
    if isinstance(value, str):
        return Figure(value)
    label, unit = value
    return Figure(str(label), str(unit))


def _labelled(fn: Callable[[Any], Mapping[str, FigureValue]], labels: dict[str, Figure]
              ) -> Callable[[Any], dict[str, FigureValue]]:
    # figures without a declared label are shown under their own name
    def figures(result: Any) -> dict[str, FigureValue]:
        out = dict(fn(result))
        for k in out:
            labels.setdefault(k, Figure(k.replace("_", " ")))
        return out

    return figures


def unregister_analysis(name: str) -> AnalysisSpec:
    """Remove analysis ``name`` from the registry and return its spec."""
    _ensure_builtins()
    with _LOCK:
        if name not in _SPECS:
            raise ValueError(f"no analysis named {name!r} is registered; registered: "
                             f"{', '.join(_SPECS)}")
        return _SPECS.pop(name)


@contextlib.contextmanager
def temporary_analysis(name: str, function: Callable[..., Any] | str, **kwargs: Any
                       ) -> Iterator[AnalysisSpec]:
    """Register an analysis for the duration of a ``with`` block (tests, notebooks)."""
    spec = register_analysis(name, function, **kwargs)
    try:
        yield spec
    finally:
        with _LOCK:
            if _SPECS.get(name) is spec:
                del _SPECS[name]


# ---------------------------------------------------------------------- shared reductions
def nanmedian(a: Any, axis: Any = None) -> Any:
    """``np.nanmedian`` without the warning of an all-NaN slice (it gives NaN)."""
    with warnings.catch_warnings():
        warnings.simplefilter("ignore", RuntimeWarning)
        return np.nanmedian(a, axis=axis)


def median_curve(a: Any) -> np.ndarray:
    """Median over every axis but the last: a (..., L) array -> an (L,) float array."""
    arr = np.asarray(a, dtype=float)
    if arr.ndim <= 1:
        return arr.reshape(-1)
    if arr.size == 0:
        return np.empty(0)
    flat = arr.reshape(-1, arr.shape[-1])  # (N, L)
    return np.asarray(nanmedian(flat, axis=0)) if flat.shape[0] else np.empty(0)


def scalar(v: Any) -> float | None:
    """A float from a number or the median of an array; None when there is none."""
    if v is None:
        return None
    try:
        a = np.asarray(v, dtype=float)
    except (TypeError, ValueError):
        return None
    if a.ndim == 0:
        return float(a)
    return float(nanmedian(a)) if a.size else None


def floats(a: Any) -> list[Any]:
    """A JSON-ready list of floats."""
    return np.asarray(a, dtype=float).tolist()


def finite(v: Any) -> bool:
    return v is not None and not isinstance(v, str) and math.isfinite(v)


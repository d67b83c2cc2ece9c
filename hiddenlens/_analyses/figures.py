"""Key figures of analysis results: extraction, labels, text, plain words, JSON arrays, Δ rows.

Everything reads the registry (:mod:`hiddenlens._core.registry`), so a registered analysis gets the
same treatment as the built-in ones in the report, the comparison table and the widgets.
"""

from __future__ import annotations

import math
from collections.abc import Mapping
from dataclasses import dataclass
from typing import Any

import numpy as np

from .._core.registry import Figure, registered
from .._core.trace import Trace

__all__ = [
    "FigureRow",
    "array_summaries",
    "describe_inputs",
    "figure_labels",
    "figure_rows",
    "format_delta",
    "format_figure",
    "key_figures",
    "summary_sentence",
]


def figure_labels() -> dict[str, Figure]:
    """Every key figure of the registry, name -> label and unit, in display order."""
    out: dict[str, Figure] = {}
    for spec in registered():
        out.update(spec.figures)
    return out


def key_figures(results: Mapping[str, Any]) -> dict[str, Any]:
    """The headline numbers of whatever results are present, in registry order.

    Parameters
    ----------
    results : Mapping[str, result]
        Analysis name -> result object, e.g. from :func:`run_analyses`. Absent analyses
        simply give no figures.

    Returns
    -------
    dict
        Python floats, ints and strings only (JSON-ready; NaN/inf kept as floats):

        - ``top_singular_value_median`` over samples and steps, ``spectral_radius_median``.
        - ``gradient_rate``: fitted log-rate of the gradient norm per step of lag (negative:
          shrinking), ``gradient_half_life`` in steps, ``gradient_verdict``.
        - ``lyapunov_max``: largest Lyapunov exponent, natural log per step;
          ``kaplan_yorke_dimension``.
        - ``participation_ratio`` of the state covariance.
        - ``fixed_points_<class>``: counts of stable, saddle, unstable and marginal points.
        - ``memory_span`` in steps (-1: none even at lag 0), ``memory_capacity`` (sum of the
          memory curve), ``memory_max_lag``: the longest lag tried (a span equal to it is a
          lower bound).
        - then the figures of registered analyses.
    """
    if not isinstance(results, Mapping):
        raise TypeError(f"results must be a mapping analysis name -> result (from "
                        f"run_analyses), got {type(results).__name__}")
    fig: dict[str, Any] = {}
    for spec in registered():
        r = results.get(spec.name)
        if r is not None:
            try:
                fig.update(spec.key_figures(r))
            except (AttributeError, TypeError, KeyError) as err:
                raise TypeError(
                    f"results[{spec.name!r}] is a {type(r).__name__}, not a result of the "
                    f"{spec.name!r} analysis ({type(err).__name__}: {err}); pass the mapping "
                    "that run_analyses returns") from None
    order = list(figure_labels())
    return dict(sorted(fig.items(), key=lambda kv: order.index(kv[0]) if kv[0] in order
                       else len(order)))


def format_figure(key: str, value: Any) -> str:
    """A figure as text: 3 significant digits for floats, counts as integers."""
    if value is None:
        return "-"
    if isinstance(value, str):
        return value
    if isinstance(value, (int, np.integer)) and not isinstance(value, bool):
        return str(int(value))
    v = float(value)
    if math.isnan(v):
        return "n/a"
    if key == "gradient_half_life" and v == math.inf:
        return "no decay seen"  # a statement, not an overflow
    if math.isinf(v):
        return "inf" if v > 0 else "-inf"
    return f"{v:.3g}"


def format_delta(key: str, delta: Any) -> str:
    """A difference as text, with its sign ("+0.2", "-3", "same", "-")."""
    if isinstance(delta, str) or delta is None:
        return delta or "-"
    if math.isinf(float(delta)):
        return "not comparable"  # one of the two is infinite: no finite difference
    text = format_figure(key, delta)
    return f"+{text}" if not isinstance(delta, str) and float(delta) > 0 else text


def summary_sentence(figures: Mapping[str, Any]) -> str:
    """Key figures in plain words, skipping the absent ones.

    Example: ``"gradients shrink ~10x every 23 steps; memory span 41 steps; 3 stable fixed
    points"``.
    """
    if not isinstance(figures, Mapping):
        raise TypeError(f"figures must be a mapping of key figures (from key_figures()), got "
                        f"{type(figures).__name__}")
    parts: list[str] = []
    for spec in registered():
        parts += spec.phrases(figures)
    if not parts and any(isinstance(v, float) and math.isnan(v) for v in figures.values()):
        return "no key figure could be measured (their values are NaN: the states were not finite)"
    return "; ".join(parts)


def array_summaries(results: Mapping[str, Any]) -> dict[str, dict[str, Any]]:
    """The main arrays of each result, reduced to short JSON-ready lists.

    Returns
    -------
    dict
        ``spectra``: ``singular_values_median`` (k,), median over samples and steps per index;
        ``gradient_flow``: ``lags`` (L,), ``norms_median`` (L,), median over every other axis,
        and ``log_norms_median`` (natural log, exact where the norms leave float64's range);
        ``lyapunov``: ``exponents`` (k,); ``pca``: ``explained_variance_ratio`` (n,);
        ``fixed_points``: ``stability`` (n,), ``spectral_radius`` (n,), the largest eigenvalue
        modulus at each point; ``memory``: ``lags`` (L,), ``scores`` (L,); a registered
        analysis: what its ``arrays`` gives.
    """
    out: dict[str, dict[str, Any]] = {}
    for spec in registered():
        r = results.get(spec.name)
        if r is not None and spec.arrays is not None:
            out[spec.name] = dict(spec.arrays(r))
    return out


# ---------------------------------------------------------------------- Δ rows
@dataclass(frozen=True)
class FigureRow:
    """One key figure across runs: values per run and differences from the first run.

    ``deltas[run]`` is a number for numeric figures, ``"same"``/``"changed"`` for text
    figures, and None where either value is absent (always None for the first run).
    """

    key: str
    label: str
    unit: str
    values: Mapping[str, Any]
    deltas: Mapping[str, Any]

    @property
    def text(self) -> str:
        """Label with its unit, e.g. ``"memory span (steps)"``."""
        return f"{self.label} ({self.unit})" if self.unit else self.label

    @property
    def numeric(self) -> bool:
        return not any(isinstance(v, str) for v in self.values.values())


def _delta(v: Any, ref: Any) -> Any:
    if v is None or ref is None:
        return None
    if isinstance(v, str) or isinstance(ref, str):
        return "same" if v == ref else "changed"
    return v - ref


def figure_rows(figures: Mapping[str, Mapping[str, Any]]) -> list[FigureRow]:
    """The key-figure table of several runs: one row per figure any run has.

    Parameters
    ----------
    figures : Mapping[str, Mapping[str, Any]]
        Run name -> its key figures (see :func:`key_figures`); the first run is the
        reference of the differences.
    """
    names = list(figures)
    labels = figure_labels()
    keys = list(dict.fromkeys(k for n in names for k in figures[n]))
    keys.sort(key=lambda k: list(labels).index(k) if k in labels else len(labels))
    ref = figures[names[0]] if names else {}
    rows = []
    for k in keys:
        label = labels.get(k, Figure(k.replace("_", " ")))
        values = {n: figures[n].get(k) for n in names}
        deltas = {n: (None if i == 0 else _delta(values[n], ref.get(k)))
                  for i, n in enumerate(names)}
        rows.append(FigureRow(k, label.label, label.unit, values, deltas))
    return rows


def describe_inputs(inputs: Any, *, source: str | None = None) -> str:
    """One sentence on the inputs: shape, per-feature mean and spread, and where they came from."""
    a = inputs.inputs if isinstance(inputs, Trace) else inputs
    if hasattr(a, "detach"):
        a = a.detach().cpu().numpy()
    a = np.asarray(a)
    if np.issubdtype(a.dtype, np.integer) and a.ndim <= 2 and a.size:
        ids = a.reshape(1, -1) if a.ndim < 2 else a  # (B, T) token ids for a front end
        B, T = ids.shape
        text = (f"{B} sequence{'s' if B != 1 else ''} of {T} token ids (values "
                f"{int(ids.min())}..{int(ids.max())}, {np.unique(ids).size} distinct)")
        return f"{text}; {source}" if source else text
    a = a.astype(float)
    if a.ndim == 2:
        a = a[None]
    B, T, I = a.shape
    text = f"{B} sequence{'s' if B != 1 else ''} of {T} steps with {I} input feature" \
           f"{'s' if I != 1 else ''}"
    if I and a.size:
        mean = a.reshape(-1, I).mean(axis=0)
        std = a.reshape(-1, I).std(axis=0)
        feats = ", ".join(f"{m:.2g}\u00b1{s:.2g}" for m, s in zip(mean[:8], std[:8], strict=True))
        more = ", ..." if I > 8 else ""
        text += f" (per-feature mean\u00b1std: {feats}{more})"
    if source:
        text += f"; {source}"
    return text

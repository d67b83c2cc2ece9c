"""Run every analysis on one model with a modest budget, and boil the results down to key figures.

Shared by the notebook widgets, :func:`hiddenlens.compare_runs` and the HTML report, so that all
three show the same numbers, worded the same way.
"""

from __future__ import annotations

import importlib
import importlib.util
import inspect
import math
import time
import warnings
from collections.abc import Callable, Iterable, Mapping
from typing import Any

import numpy as np

from ._record import as_system, record
from ._systems import RecurrentSystem
from ._trace import Trace
from ._validation import as_sequences

__all__ = [
    "ANALYSES",
    "AnalysisResults",
    "FIGURES",
    "CAUTIONS",
    "analysis_function",
    "available_analyses",
    "run_analyses",
    "key_figures",
    "summary_sentence",
    "array_summaries",
    "describe_inputs",
    "format_figure",
]

#: Names of the analyses, in the order they are run and shown.
ANALYSES: tuple[str, ...] = (
    "spectra", "gradient_flow", "lyapunov", "pca", "fixed_points", "memory",
)

# analysis -> (private module, public function)
_FUNCTIONS: dict[str, tuple[str, str]] = {
    "spectra": ("hiddenlens._spectra", "jacobian_spectra"),
    "gradient_flow": ("hiddenlens._gradient_flow", "gradient_flow"),
    "lyapunov": ("hiddenlens._lyapunov", "lyapunov_spectrum"),
    "pca": ("hiddenlens._pca", "pca_trajectories"),
    "fixed_points": ("hiddenlens._fixed_points", "find_fixed_points"),
    "memory": ("hiddenlens._memory", "memory_curve"),
}

#: Short titles of the analyses, for headings and legends.
TITLES: dict[str, str] = {
    "spectra": "Jacobian singular-value spectra",
    "gradient_flow": "Gradient flow over lag",
    "lyapunov": "Lyapunov spectrum",
    "pca": "PCA trajectories and effective dimension",
    "fixed_points": "Fixed points and their stability",
    "memory": "Memory span",
}

#: How to read each analysis' numbers with care; shown beside them in reports.
CAUTIONS: dict[str, str] = {
    "spectra": "Singular values of the step Jacobians are taken along the recorded trajectory: "
               "they describe the dynamics on these inputs, not the network everywhere.",
    "gradient_flow": "The verdict (vanishing / near-isometric / exploding) is a heuristic read "
                     "off a fitted rate with fixed thresholds, not a proof about training.",
    "lyapunov": "Finite-time Lyapunov exponents of an input-driven network depend on the input "
                "statistics and on the number of steps; they are estimates, not properties "
                "of the weights alone.",
    "pca": "PCA axes are fitted to each run separately: axes of two runs are comparable only "
           "when both are projected into one basis.",
    "fixed_points": "Fixed points depend on the constant input chosen (zero unless stated); "
                    "slow points are not fixed points, and the search finds only what its "
                    "starting states lead to.",
    "memory": "Linear decoding gives a lower bound on what the state holds; the span threshold "
              "is a convention, and the answer depends on the probe input distribution.",
}

# key figure -> (label, unit or "", analysis)
FIGURES: dict[str, tuple[str, str, str]] = {
    "lyapunov_max": ("largest Lyapunov exponent", "per step", "lyapunov"),
    "kaplan_yorke_dimension": ("Kaplan-Yorke dimension", "", "lyapunov"),
    "gradient_rate": ("gradient log-rate", "per step", "gradient_flow"),
    "gradient_half_life": ("gradient half-life", "steps", "gradient_flow"),
    "gradient_verdict": ("gradient verdict", "", "gradient_flow"),
    "memory_span": ("memory span", "steps", "memory"),
    "memory_capacity": ("memory capacity", "", "memory"),
    "memory_max_lag": ("longest memory lag tried", "steps", "memory"),
    "participation_ratio": ("participation ratio", "", "pca"),
    "fixed_points_stable": ("stable fixed points", "", "fixed_points"),
    "fixed_points_saddle": ("saddle points", "", "fixed_points"),
    "fixed_points_unstable": ("unstable fixed points", "", "fixed_points"),
    "fixed_points_marginal": ("marginal fixed points", "", "fixed_points"),
    "top_singular_value_median": ("median top singular value", "", "spectra"),
    "spectral_radius_median": ("median spectral radius", "", "spectra"),
}

_STABILITY_CLASSES = ("stable", "saddle", "unstable", "marginal")


class AnalysisResults(dict):
    """The results of :func:`run_analyses`: a plain ``dict`` analysis name -> result object.

    Attributes
    ----------
    trace : Trace
        The states recorded once on the given inputs (B, T, S) and shared by the analyses.
    skipped : dict[str, str]
        Analyses that were not run, with the reason (not installed, or failed with
        ``on_error="skip"``).
    seconds : dict[str, float]
        Wall time of each analysis that ran.
    options : dict[str, dict]
        The keyword options each analysis was called with.
    """

    def __init__(self, *args: Any, **kwargs: Any) -> None:
        super().__init__(*args, **kwargs)
        self.trace: Trace | None = None
        self.skipped: dict[str, str] = {}
        self.seconds: dict[str, float] = {}
        self.options: dict[str, dict[str, Any]] = {}


# ---------------------------------------------------------------------- which analyses exist
def _module_exists(module: str) -> bool:
    return importlib.util.find_spec(module) is not None


def available_analyses() -> tuple[str, ...]:
    """The names in :data:`ANALYSES` whose implementation is present in this installation."""
    return tuple(a for a in ANALYSES if _module_exists(_FUNCTIONS[a][0]))


def analysis_function(name: str) -> Callable[..., Any]:
    """The public function behind analysis ``name`` (e.g. ``"lyapunov"`` -> lyapunov_spectrum)."""
    _check_names([name], "analysis")
    module, func = _FUNCTIONS[name]
    if not _module_exists(module):
        raise ValueError(f"the {name!r} analysis ({func}) is not available in this installation "
                         f"of hiddenlens; choose among {', '.join(available_analyses())}")
    return getattr(importlib.import_module(module), func)


def _check_names(names: Iterable[Any], what: str) -> list[str]:
    out = []
    for n in names:
        if n not in ANALYSES:
            raise ValueError(f"unknown {what} {n!r}; expected one of {', '.join(ANALYSES)}")
        out.append(n)
    return out


# ---------------------------------------------------------------------- default budgets
def _defaults(name: str, system: RecurrentSystem, trace: Trace, seed: int) -> dict[str, Any]:
    """Options sized for an interactive look or a report: seconds per analysis, not minutes."""
    B, T, S = trace.batch_size, trace.n_steps, trace.state_size
    k = None if S <= 64 else 16
    quiet = {"progress": False}
    if name == "spectra":
        # the spectral radius needs a non-symmetric eigensolver per step, several times the
        # cost of the top-k singular values (measured: 4000 steps of a 128-unit GRU, 6.5 s for
        # k = 16 alone, 25 s with all values and radii): only for small states by default
        return {"k": k, "radius": S <= 64, **quiet}
    if name == "gradient_flow":
        return {"seed": seed, **quiet}
    if name == "lyapunov":
        return {"k": k, "warmup": min(100, T // 4), "seed": seed, **quiet}
    if name == "pca":
        return {"k": min(3, S, B * T)}
    if name == "fixed_points":
        return {"n_starts": min(64, B * T), "seed": seed, **quiet}
    if name == "memory":
        # probe mode: 5 sequences of 600 counted steps fit 41 lags of ridge readouts in well
        # under a second for S = 32 (the library default of 2000 steps is for final numbers)
        return {"max_lag": 40, "n_steps": 40 + 600, "seed": seed, **quiet}
    return {}


def _accepted(fn: Callable[..., Any]) -> tuple[set[str], bool]:
    params = inspect.signature(fn).parameters.values()
    names = {p.name for p in params if p.kind in (p.KEYWORD_ONLY, p.POSITIONAL_OR_KEYWORD)}
    return names, any(p.kind == p.VAR_KEYWORD for p in params)


def _call_options(name: str, fn: Callable[..., Any], defaults: Mapping[str, Any],
                  user: Mapping[str, Any]) -> dict[str, Any]:
    names, var_kw = _accepted(fn)
    # a default budget the function does not know is dropped; a user's option is not
    opts = {k: v for k, v in defaults.items() if var_kw or k in names}
    if name == "memory" and (user.get("trace", user.get("inputs")) is not None
                             or user.get("mode") == "data"):
        # the user's sequences set the size of a data-mode curve: no probe budget
        opts.pop("n_steps", None)
        opts.pop("n_sequences", None)
    unknown = [k for k in user if not (var_kw or k in names)]
    if unknown:
        raise ValueError(
            f"options {unknown} are not options of {fn.__name__} (the {name!r} analysis); "
            f"it accepts {', '.join(sorted(names - {'system', 'model_or_system', 'trace'}))}"
        )
    opts.update(user)
    return opts


def _invoke(name: str, fn: Callable[..., Any], system: RecurrentSystem, trace: Trace,
            inputs: Any, opts: dict[str, Any]) -> Any:
    if name == "pca":
        return fn(trace, **opts)
    if name == "lyapunov":
        return fn(system, trace, **opts)
    if name == "memory":
        # probe mode unless the caller asks for the data: i.i.d. probes keep the inputs' own
        # autocorrelation out of the curve
        return fn(system, **opts)
    return fn(system, trace, **opts)


# ---------------------------------------------------------------------- running
def run_analyses(
    model_or_system: Any,
    inputs: Any,
    *,
    which: Iterable[str] | None = None,
    options: Mapping[str, Mapping[str, Any]] | None = None,
    progress: bool | Callable[[str, int, int], Any] | None = None,
    seed: int = 0,
    on_error: str = "raise",
    trace: Trace | None = None,
) -> AnalysisResults:
    """Record a model once on ``inputs`` and run the chosen analyses with modest budgets.

    Parameters
    ----------
    model_or_system : RecurrentSystem, nn.Module or callable
        Anything :func:`hiddenlens.wrap` accepts, or a system.
    inputs : Tensor or ndarray of shape (B, T, I)
        The sequences the states are recorded on (batch first). The memory analysis uses its
        own i.i.d. probe inputs unless ``options={"memory": {"inputs": ...}}`` says otherwise.
    which : iterable of str, optional
        Names from :data:`ANALYSES`; default: every analysis available in this installation
        (the others are listed in ``.skipped``). Naming an unavailable one is an error.
    options : mapping, optional
        Per-analysis keyword options, e.g. ``{"lyapunov": {"k": 5}, "memory": {"max_lag": 80}}``;
        they override the default budgets. Unknown options raise ``ValueError``.
    progress : bool or callable, optional
        ``True`` shows a progress bar over the analyses; a callable is called as
        ``progress(name, done, total)`` before each analysis (and as ``progress("done", total,
        total)`` at the end); raise from it to stop. Default: no progress display.
    seed : int, default 0
        Seed of the analyses that draw random numbers (start frames, starting states, probes),
        so results repeat exactly.
    on_error : {"raise", "skip"}, default "raise"
        An analysis that fails raises its exception (the default: the caller decides), or is
        left out with its message in ``.skipped``.
    trace : Trace, optional
        Reuse a trace already recorded from this model on these inputs.

    Returns
    -------
    AnalysisResults
        A ``dict`` analysis name -> result object in :data:`ANALYSES` order, with ``.trace``,
        ``.skipped``, ``.seconds`` and ``.options``.

    Notes
    -----
    The default budgets (all exponents and singular values up to 64 states, 64 fixed-point
    starts, memory lags up to 40 on 5 probe sequences of 640 steps) keep a 32-state model at
    about a second per analysis.
    """
    if on_error not in ("raise", "skip"):
        raise ValueError(f"on_error must be 'raise' or 'skip', got {on_error!r}")
    system = as_system(model_or_system)
    if which is None:
        names = list(available_analyses())
        missing = [a for a in ANALYSES if a not in names]
    else:
        if isinstance(which, str):
            which = [which]
        names = _check_names(which, "analysis")
        missing = []
    options = dict(options or {})
    _check_names(options, "analysis in options")
    for a, o in options.items():
        if not isinstance(o, Mapping):
            raise TypeError(f"options[{a!r}] must be a mapping of keyword options, got "
                            f"{type(o).__name__}; e.g. options={{{a!r}: {{...}}}}")
    fns = {a: analysis_function(a) for a in names}  # fail before any work

    x = as_sequences(inputs, system.input_size, system.dtype, what=f"the {system.source} model")
    if trace is None:
        trace = record(system, x)
    out = AnalysisResults()
    out.trace = trace
    for a in missing:
        out.skipped[a] = (f"not available in this installation ({_FUNCTIONS[a][0]} "
                          "is missing)")
    for a in names:
        out.options[a] = _call_options(a, fns[a], _defaults(a, system, trace, seed),
                                       options.get(a, {}))

    bar = None
    if progress is True:
        from tqdm.auto import tqdm

        bar = tqdm(total=len(names), desc="analyses", leave=False)
    try:
        for i, a in enumerate(names):
            if callable(progress):
                progress(a, i, len(names))
            if bar is not None:
                bar.set_postfix_str(a)
            t0 = time.perf_counter()
            try:
                res = _invoke(a, fns[a], system, trace, x, dict(out.options[a]))
            except Exception as err:
                if on_error == "raise":
                    raise
                out.skipped[a] = f"failed: {type(err).__name__}: {err}"
            else:
                out[a] = res
                out.seconds[a] = time.perf_counter() - t0
            if bar is not None:
                bar.update(1)
        if callable(progress):
            progress("done", len(names), len(names))
    finally:
        if bar is not None:
            bar.close()
    return out


# ---------------------------------------------------------------------- key figures
def _first_attr(obj: Any, names: Iterable[str]) -> Any:
    for n in names:
        v = getattr(obj, n, None)
        if v is not None:
            return v
    return None


def _scalar(v: Any) -> float | None:
    if v is None:
        return None
    try:
        a = np.asarray(v, dtype=float)
    except (TypeError, ValueError):
        return None
    if a.ndim == 0:
        return float(a)
    if a.size == 0:
        return None
    return float(_nanmedian(a))


def key_figures(results: Mapping[str, Any]) -> dict[str, Any]:
    """The headline numbers of whatever results are present, keyed as in :data:`FIGURES`.

    Parameters
    ----------
    results : Mapping[str, result]
        Analysis name (see :data:`ANALYSES`) -> result object, e.g. from :func:`run_analyses`.
        Absent analyses simply give no figures.

    Returns
    -------
    dict
        Python floats, ints and strings only (JSON-ready; NaN/inf kept as floats), in the
        order of :data:`FIGURES`:

        - ``lyapunov_max``: largest Lyapunov exponent, natural log per step;
          ``kaplan_yorke_dimension``.
        - ``gradient_rate``: fitted log-rate of the gradient norm per step of lag (negative:
          shrinking), ``gradient_half_life`` in steps, ``gradient_verdict``.
        - ``memory_span`` in steps (-1: none even at lag 0), ``memory_capacity`` (sum of the
          memory curve), ``memory_max_lag``: the longest lag tried (a span equal to it is a
          lower bound).
        - ``participation_ratio`` of the state covariance.
        - ``fixed_points_<class>``: counts of stable, saddle, unstable and marginal points.
        - ``top_singular_value_median`` over samples and steps, ``spectral_radius_median``.
    """
    fig: dict[str, Any] = {}
    r = results.get("lyapunov")
    if r is not None:
        ex = np.asarray(r.exponents, dtype=float)
        if ex.size:
            fig["lyapunov_max"] = float(ex[0])
        ky = _first_attr(r, ("kaplan_yorke_dimension", "kaplan_yorke", "kaplan_yorke_dim"))
        if ky is not None:
            fig["kaplan_yorke_dimension"] = float(ky)
    r = results.get("gradient_flow")
    if r is not None:
        rate = _scalar(_first_attr(r, ("rate", "log_rate", "rate_per_step", "decay_rate")))
        if rate is not None:
            fig["gradient_rate"] = rate
        hl = _scalar(_first_attr(r, ("half_life",)))
        if hl is not None:
            fig["gradient_half_life"] = hl
        verdict = getattr(r, "verdict", None)
        if verdict is not None:
            fig["gradient_verdict"] = str(verdict)
    r = results.get("memory")
    if r is not None:
        for key, attr in (("memory_span", "span"), ("memory_capacity", "capacity")):
            v = _scalar(getattr(r, attr, None))
            if v is not None:
                fig[key] = v
        lags = np.asarray(getattr(r, "lags", ()), dtype=float)
        if lags.size:
            fig["memory_max_lag"] = float(lags.max())
    r = results.get("pca")
    if r is not None:
        v = _scalar(getattr(r, "participation_ratio", None))
        if v is not None:
            fig["participation_ratio"] = v
    r = results.get("fixed_points")
    if r is not None:
        stab = [str(s) for s in np.asarray(r.stability, dtype=object).ravel()]
        for c in _STABILITY_CLASSES:
            fig[f"fixed_points_{c}"] = int(sum(s == c for s in stab))
    r = results.get("spectra")
    if r is not None:
        sv = np.asarray(r.singular_values, dtype=float)  # (B, T, k)
        if sv.size:
            fig["top_singular_value_median"] = float(_nanmedian(sv[..., 0]))
        rho = _scalar(_first_attr(r, ("spectral_radius", "spectral_radii")))
        if rho is not None:
            fig["spectral_radius_median"] = rho
    return {k: fig[k] for k in FIGURES if k in fig}


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
    if math.isinf(v):
        return "inf" if v > 0 else "-inf"
    return f"{v:.3g}"


def _steps(v: float) -> str:
    return f"{v:.0f}" if v >= 10 else f"{v:.2g}"


def summary_sentence(figures: Mapping[str, Any]) -> str:
    """Key figures in plain words, skipping the absent ones.

    Example: ``"gradients shrink ~10x every 23 steps; memory span 41 steps; 3 stable fixed
    points"``.
    """
    parts: list[str] = []
    rate = figures.get("gradient_rate")
    if rate is not None and math.isfinite(rate) and rate != 0:
        every = math.log(10.0) / abs(rate)
        word = "shrink" if rate < 0 else "grow"
        if every > 1e4:
            parts.append("gradients keep their size over the lags seen")
        else:
            parts.append(f"gradients {word} ~10x every {_steps(every)} steps")
    elif figures.get("gradient_half_life") is not None:
        hl = float(figures["gradient_half_life"])
        if math.isfinite(hl) and hl > 0:
            parts.append(f"gradients shrink ~10x every {_steps(hl * math.log2(10.0))} steps")
    verdict = figures.get("gradient_verdict")
    if verdict:
        parts.append(f"gradient flow {verdict}")
    top = figures.get("top_singular_value_median")
    if not parts and top is not None and math.isfinite(top):
        # without the gradient figures, the step Jacobians say how one step stretches states
        parts.append(f"one step stretches states by up to {top:.3g}x (median)")
    lam = figures.get("lyapunov_max")
    if lam is not None and math.isfinite(lam):
        kind = "chaotic on these inputs" if lam > 0.01 else (
            "near the edge of chaos" if lam > -0.01 else "contracting")
        parts.append(f"largest Lyapunov exponent {lam:+.3g}/step ({kind})")
    span = figures.get("memory_span")
    if span is not None and math.isfinite(span):
        limit = figures.get("memory_max_lag")
        if span < 0:
            parts.append("no linear memory of the inputs, even at lag 0")
        elif limit is not None and span >= limit:
            parts.append(f"memory span at least {span:.0f} steps (the longest lag tried)")
        else:
            parts.append(f"memory span {span:.0f} step{'s' if span != 1 else ''}")
    mc = figures.get("memory_capacity")
    if mc is not None and math.isfinite(mc):
        parts.append(f"memory capacity {mc:.3g}")
    pr = figures.get("participation_ratio")
    if pr is not None and math.isfinite(pr):
        parts.append(f"effective dimension {pr:.3g}")
    counts = [(c, figures.get(f"fixed_points_{c}")) for c in _STABILITY_CLASSES]
    if any(n is not None for _, n in counts):
        found = [f"{n} {c}" for c, n in counts if n]
        if found:
            noun = "fixed point" if sum(n for _, n in counts if n) == 1 else "fixed points"
            parts.append(", ".join(found) + f" {noun}")
        else:
            parts.append("no fixed point found")
    return "; ".join(parts)


# ---------------------------------------------------------------------- JSON-ready arrays
def _nanmedian(a: np.ndarray, axis: Any = None) -> Any:
    # an all-NaN slice (e.g. a curve that exploded) gives NaN, without a warning
    with warnings.catch_warnings():
        warnings.simplefilter("ignore", RuntimeWarning)
        return np.nanmedian(a, axis=axis)


def _median_curve(a: Any) -> list[float]:
    """Median over every axis but the last: a (..., L) array -> a list of L floats."""
    arr = np.asarray(a, dtype=float)
    if arr.ndim <= 1:
        return [float(v) for v in arr.reshape(-1)]
    flat = arr.reshape(-1, arr.shape[-1])
    return [float(v) for v in _nanmedian(flat, axis=0)] if flat.shape[0] else []


def _floats(a: Any) -> list[Any]:
    return np.asarray(a, dtype=float).tolist()


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
        modulus at each point; ``memory``: ``lags`` (L,), ``scores`` (L,).
    """
    out: dict[str, dict[str, Any]] = {}
    r = results.get("spectra")
    if r is not None:
        out["spectra"] = {"singular_values_median": _median_curve(r.singular_values)}
    r = results.get("gradient_flow")
    if r is not None:
        out["gradient_flow"] = {"lags": _floats(r.lags), "norms_median": _median_curve(r.norms)}
        if getattr(r, "log_norms", None) is not None:
            out["gradient_flow"]["log_norms_median"] = _median_curve(r.log_norms)
    r = results.get("lyapunov")
    if r is not None:
        out["lyapunov"] = {"exponents": _floats(r.exponents)}
    r = results.get("pca")
    if r is not None:
        out["pca"] = {"explained_variance_ratio": _floats(r.explained_variance_ratio)}
    r = results.get("fixed_points")
    if r is not None:
        ev = np.asarray(r.eigenvalues)
        rho = np.abs(ev).max(axis=-1) if ev.ndim == 2 and ev.shape[-1] else np.zeros(len(ev))
        out["fixed_points"] = {
            "stability": [str(s) for s in np.asarray(r.stability, dtype=object).ravel()],
            "spectral_radius": _floats(rho),
        }
    r = results.get("memory")
    if r is not None:
        out["memory"] = {"lags": _floats(r.lags), "scores": _median_curve(r.scores)}
    return out


def describe_inputs(inputs: Any, *, source: str | None = None) -> str:
    """One sentence on the inputs: shape, per-feature mean and spread, and where they came from."""
    a = inputs.inputs if isinstance(inputs, Trace) else inputs
    if hasattr(a, "detach"):
        a = a.detach().cpu().numpy()
    a = np.asarray(a, dtype=float)
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

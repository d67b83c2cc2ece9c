"""The built-in analyses as registry specs: budgets, key figures, words, arrays, drawings.

Functions are named as ``"module:function"`` so that nothing here imports an analysis module
before it is used. Functions whose signature is not yet ``function(system, trace, **options)``
are called through the adapters below (the one place that knows their older call forms).
"""

from __future__ import annotations

import math
from collections.abc import Callable, Mapping, Sequence
from typing import Any

import numpy as np

from .._core.registry import (
    STABILITY_CLASSES,
    AnalysisSpec,
    Drawing,
    Figure,
    add_spec,
    finite,
    floats,
    median_curve,
    nanmedian,
    scalar,
)

Runs = Sequence[tuple[str, Any]]


# ---------------------------------------------------------------------- call adapters
def _call_memory(fn: Callable[..., Any], system: Any, trace: Any, **opts: Any) -> Any:
    # data mode on the recorded trace by default: the model's own inputs keep its states where
    # it works (probes once drove a trained LSTM's |c| to 1903, against 28 on its inputs).
    # Sequences given as options={"memory": {"inputs": x}} are recorded here, once; probe mode
    # on request, its states checked against the recorded trace's range
    data = opts.pop("inputs", None)
    if data is not None:
        from .._core.record import record

        return fn(system, record(system, data), **opts)
    if opts.get("mode", "data") == "data":
        return fn(system, trace, **opts)
    opts.setdefault("reference", trace)
    return fn(system, **opts)  # memory_curve(system): probe mode


def _call_task_memory(fn: Callable[..., Any], system: Any, trace: Any, **opts: Any) -> Any:
    # the task variables may belong to trials other than the inputs of the other analyses:
    # options={"task_memory": {"inputs": trials}} records those once, here
    data = opts.pop("inputs", None)
    if data is not None:
        from .._core.record import record

        trace = record(system, data)
    return fn(system, trace, **opts)


#: analysis -> adapter(function, system, trace, **options); absent: function(system, trace, ...)
ADAPTERS: dict[str, Callable[..., Any]] = {
    "memory": _call_memory,
    "task_memory": _call_task_memory,
    # the task targets may belong to trials of their own (as for task memory): PCA with
    # options={"pca": {"inputs": trials}} is fitted on those, so their labels fit its trace
    "pca": _call_task_memory,
}


# ---------------------------------------------------------------------- budgets
def _k(trace: Any) -> int | None:
    return None if trace.state_size <= 64 else 16


def _budget_spectra(system: Any, trace: Any, seed: int) -> dict[str, Any]:
    # the spectral radius needs a non-symmetric eigensolver per step, several times the cost
    # of the top-k singular values (measured: 4000 steps of a 128-unit GRU, 6.5 s for k = 16
    # alone, 25 s with all values and radii): only for small states by default
    return {"k": _k(trace), "radius": trace.state_size <= 64, "progress": False}


def _budget_gradient_flow(system: Any, trace: Any, seed: int) -> dict[str, Any]:
    return {"seed": seed, "progress": False}


def _shortest(trace: Any) -> int:
    """Steps of the shortest sequence (the real ones of a trace recorded with lengths)."""
    lengths = trace.metadata.get("lengths")
    return int(min(lengths)) if lengths else trace.n_steps


def _budget_lyapunov(system: Any, trace: Any, seed: int) -> dict[str, Any]:
    return {"k": _k(trace), "warmup": min(100, _shortest(trace) // 4), "seed": seed,
            "progress": False}


def _budget_pca(system: Any, trace: Any, seed: int) -> dict[str, Any]:
    from .pca import _default_parts

    # the units PCA reads by default (an LSTM's h parts: proj_size units each with projection)
    units = trace.columns(_default_parts(trace)).size
    return {"k": min(3, units, trace.batch_size * trace.n_steps)}


def _budget_fixed_points(system: Any, trace: Any, seed: int) -> dict[str, Any]:
    return {"n_starts": min(64, trace.batch_size * trace.n_steps), "seed": seed,
            "progress": False}


def _budget_memory(system: Any, trace: Any, seed: int, *, options: Mapping[str, Any]
                   ) -> dict[str, Any]:
    data = options.get("inputs")
    # probe-only options without a mode ask for probe mode
    probing = any(options.get(k) is not None for k in ("n_sequences", "n_steps"))
    if data is not None or options.get("mode", "probe" if probing else "data") == "data":
        # the user's sequences set the size of a data-mode curve: no probe budget; lags up to
        # 40 leaving at least half the steps (and 10) as decoded rows. Fewer sequences than
        # the 5 folds: folds are blocks of time with max_lag steps of gap on each side
        if data is None:
            B, T = trace.batch_size, trace.n_steps
        else:  # (B, T, I) or one sequence (T, I)
            shape = np.shape(data)
            B, T = (1, int(shape[0])) if len(shape) == 2 else (int(shape[0]), int(shape[1]))
        room = min(T // 2, T - 10) if B >= 5 else (T - 10) // 4
        return {"max_lag": max(0, min(40, room)), "mode": "data", "seed": seed,
                "progress": False}
    # probe mode: 5 sequences of 600 counted steps fit 41 lags of ridge readouts in well under
    # a second for S = 32 (the library default of 2000 steps is for final numbers)
    return {"max_lag": 40, "n_steps": 40 + 600, "mode": "probe", "seed": seed,
            "progress": False}


def _budget_task_memory(system: Any, trace: Any, seed: int, *,
                        options: Mapping[str, Any] | None = None) -> dict[str, Any]:
    # 19 permutations reach the 5% band (the smallest p-value is 1/20); 3 folds of whole
    # sequences, lags up to 50 and no cross-temporal matrix keep the shipped 64-unit GRU on 96
    # trials at a few seconds (the library defaults, 5 folds x 20 permutations with the
    # matrix, are for final numbers)
    options = options or {}
    data = options.get("inputs")
    T = int(np.shape(data)[1]) if data is not None and np.ndim(data) == 3 else trace.n_steps
    onsets = options.get("onsets")
    latest = int(np.max(onsets)) if onsets is not None and np.size(onsets) else 0
    per_step = np.ndim(options.get("targets")) == 2 and np.shape(options["targets"])[1] > 1
    room = (T - latest) // 2 if per_step else T - 1 - latest
    return {"max_lag": max(0, min(50, room)), "n_folds": 3,
            "n_permutations": 19, "cross_temporal": False, "max_iter": 100, "seed": seed}


# ---------------------------------------------------------------------- key figures
def _scalars(**values: Any) -> dict[str, Any]:
    """Each value as a float (the median of an array), leaving out those without one."""
    out = {key: scalar(value) for key, value in values.items()}
    return {key: v for key, v in out.items() if v is not None}


def _figures_spectra(r: Any) -> dict[str, Any]:
    out: dict[str, Any] = {}
    sv = np.asarray(r.singular_values, dtype=float)  # (B, T, k)
    if sv.size:
        out["top_singular_value_median"] = float(nanmedian(sv[..., 0]))
    return out | _scalars(spectral_radius_median=r.spectral_radius)


def _figures_gradient_flow(r: Any) -> dict[str, Any]:
    out = _scalars(gradient_rate=r.rate, gradient_half_life=r.half_life)
    meta = getattr(r, "metadata", None) or {}
    if r.verdict is not None:
        note = meta.get("verdict_note")
        out["gradient_verdict"] = str(r.verdict) + (f" ({note})" if note else "")
    if isinstance(meta.get("counted_lags"), (int, np.integer)):
        out["gradient_lags"] = int(meta["counted_lags"])
    return out


def _figures_lyapunov(r: Any) -> dict[str, Any]:
    out: dict[str, Any] = {}
    ex = np.asarray(r.exponents, dtype=float)  # (k,)
    if ex.size:
        out["lyapunov_max"] = float(ex[0])
    if r.kaplan_yorke is not None:
        out["kaplan_yorke_dimension"] = float(r.kaplan_yorke)
    if isinstance(getattr(r, "n_steps", None), (int, np.integer)):
        out["lyapunov_steps"] = int(r.n_steps)
    growth = (getattr(r, "metadata", None) or {}).get("state_growth")
    if growth is not None:
        out["lyapunov_state_growth"] = float(growth)
    return out


def _figures_pca(r: Any) -> dict[str, Any]:
    return _scalars(participation_ratio=r.participation_ratio)


def _figures_fixed_points(r: Any) -> dict[str, Any]:
    stab = [str(s) for s in np.asarray(r.stability, dtype=object).ravel()]
    out = getattr(r, "outside", None)  # points the recorded states do not reach: not counted
    out = np.zeros(len(stab), bool) if out is None else np.asarray(out, bool).ravel()
    kinds = np.array(stab, dtype=object)
    figures = {f"fixed_points_{c}": int(np.sum((kinds == c) & ~out)) for c in STABILITY_CLASSES}
    figures["fixed_points_outside"] = int(out.sum())
    if getattr(r, "slow_set_dimension", None) is not None:
        figures["slow_set_dimension"] = int(r.slow_set_dimension)
    return figures


def _figures_memory(r: Any) -> dict[str, Any]:
    out = _scalars(memory_span=r.span, memory_capacity=r.capacity)
    lags = np.asarray(r.lags, dtype=float)
    if lags.size:
        out["memory_max_lag"] = float(lags.max())
    return out


def _figures_task_memory(r: Any) -> dict[str, Any]:
    from .task_memory import task_memory_key_figures

    f = task_memory_key_figures(r)
    return {"task_memory_span": f["task_span"], "task_memory_peak": f["task_peak_score"],
            "task_memory_chance": f["task_chance"],
            "task_memory_max_lag": int(r.max_lag), "task_memory_score": f["task_score_name"]}


# ---------------------------------------------------------------------- words
#: A largest Lyapunov exponent from fewer counted steps is quoted as not conclusive.
LYAPUNOV_MIN_STEPS = 100


def _steps(v: float) -> str:
    return f"{v:.0f}" if v >= 10 else f"{v:.2g}"


def _gradient_words(f: Mapping[str, Any]) -> list[str]:
    parts = []
    rate, hl = f.get("gradient_rate"), f.get("gradient_half_life")
    if finite(rate) and rate != 0:
        every = math.log(10.0) / abs(rate)
        word = "shrink" if rate < 0 else "grow"
        lags = f.get("gradient_lags")
        if every > 1e4:
            parts.append("gradients keep their size over the lags seen")
        elif lags is not None and every > lags:
            parts.append(f"gradients {word} ~10x every {_steps(every)} steps (extrapolated "
                         f"from {lags} lag{'s' if lags != 1 else ''})")
        else:
            parts.append(f"gradients {word} ~10x every {_steps(every)} steps"
                         + ("" if lags is None else f" (fit on {lags} lags)"))
    elif finite(hl) and hl > 0:
        parts.append(f"gradients shrink ~10x every {_steps(hl * math.log2(10.0))} steps")
    if f.get("gradient_verdict"):
        parts.append(f"gradient flow {f['gradient_verdict']}")
    return parts


def _spectra_words(f: Mapping[str, Any]) -> list[str]:
    top = f.get("top_singular_value_median")
    if isinstance(top, float) and math.isnan(top):
        return ["one-step stretch could not be measured (no step had finite states)"]
    if _gradient_words(f) or not finite(top):
        return []  # the gradient figures say more about stretching over many steps
    return [f"one step stretches states by up to {top:.3g}x (median)"]


def _lyapunov_words(f: Mapping[str, Any]) -> list[str]:
    lam = f.get("lyapunov_max")
    if not finite(lam):
        return []
    from .lyapunov import is_unbounded

    growth = f.get("lyapunov_state_growth")
    if is_unbounded(growth, f.get("lyapunov_steps")):
        # a positive exponent of an unbounded trajectory is divergence, not chaos
        kind = (f"the states grow without bound, ~x{math.exp(growth):.3g} per step: "
                "divergence, not chaos")
    else:
        kind = "chaotic on these inputs" if lam > 0.01 else (
            "near the edge of chaos" if lam > -0.01 else "contracting")
    n = f.get("lyapunov_steps")
    if n is not None and n < LYAPUNOV_MIN_STEPS:
        kind += f"; from only {n} counted step{'s' if n != 1 else ''}, not conclusive"
    elif n is not None:
        kind += f"; {n} counted steps"
    return [f"largest Lyapunov exponent {lam:+.3g}/step ({kind})"]


def _pca_words(f: Mapping[str, Any]) -> list[str]:
    pr = f.get("participation_ratio")
    return [f"participation ratio {pr:.3g}"] if finite(pr) else []


def _fixed_point_words(f: Mapping[str, Any]) -> list[str]:
    counts = [(c, f.get(f"fixed_points_{c}")) for c in STABILITY_CLASSES]
    if all(n is None for _, n in counts):
        return []
    found = [f"{n} {c}" for c, n in counts if n]
    n_out = f.get("fixed_points_outside") or 0
    if not found:
        return [f"no fixed point inside the recorded states ({n_out:.0f} outside, not counted)"
                if n_out else "no fixed point found"]
    noun = "fixed point" if sum(n for _, n in counts if n) == 1 else "fixed points"
    words = [", ".join(found) + f" {noun}"
             + (f" ({n_out:.0f} outside the recorded states, not counted)" if n_out else "")]
    if finite(f.get("slow_set_dimension")) and f["slow_set_dimension"] > 0:
        # points along a line or sheet of fixed points sample a continuum: their number is
        # the number of starts that reached it, not a count of separate points
        words.append(f"slow set of dimension {f['slow_set_dimension']:.0f}"
                     + (" (the marginal points sample a continuum; their count follows "
                        "n_starts)" if f.get("fixed_points_marginal") else ""))
    return words


def _memory_words(f: Mapping[str, Any]) -> list[str]:
    parts = []
    span, limit = f.get("memory_span"), f.get("memory_max_lag")
    # beside a task-memory span, this one is what the state keeps of the inputs themselves
    # (each input channel read back), not what it keeps of the task
    what = "memory of the raw inputs" if finite(f.get("task_memory_span")) else \
        "memory span"
    if finite(span):
        if span < 0:
            parts.append("no linear memory of the inputs, even at lag 0")
        elif limit is not None and span >= limit:
            parts.append(f"{what} at least {span:.0f} steps (the longest lag tried)")
        else:
            parts.append(f"{what} {span:.0f} step{'s' if span != 1 else ''}")
    if finite(f.get("memory_capacity")):
        parts.append(f"memory capacity {f['memory_capacity']:.3g}")
    return parts


def _task_memory_words(f: Mapping[str, Any]) -> list[str]:
    span, limit = f.get("task_memory_span"), f.get("task_memory_max_lag")
    if not finite(span):
        return []
    if span < 0:
        return ["the task variable is not linearly decodable above chance at any lag"]
    if limit is not None and span >= limit:
        return [f"holds the task variable for at least {span:.0f} steps (the longest lag "
                "tried)"]
    return [f"task variable decodable for {span:.0f} step{'s' if span != 1 else ''} after its "
            "onset"]


# ---------------------------------------------------------------------- JSON arrays
def _arrays_spectra(r: Any) -> dict[str, Any]:
    return {"singular_values_median": floats(median_curve(r.singular_values))}


def _arrays_gradient_flow(r: Any) -> dict[str, Any]:
    out = {"lags": floats(r.lags), "norms_median": floats(median_curve(r.norms))}
    if getattr(r, "log_norms", None) is not None:
        out["log_norms_median"] = floats(median_curve(r.log_norms))
    return out


def _arrays_pca(r: Any) -> dict[str, Any]:
    out: dict[str, Any] = {"explained_variance_ratio": floats(r.explained_variance_ratio),
                           "fit_steps": getattr(r, "fit_description", "all steps")}
    if getattr(r, "condition_means", None) is not None:
        out["conditions"] = list(r.condition_names)
        out["condition_steps"] = [int(t) for t in r.condition_steps]
    return out


def _arrays_fixed_points(r: Any) -> dict[str, Any]:
    ev = np.asarray(r.eigenvalues)  # (n, S)
    rho = np.abs(ev).max(axis=-1) if ev.ndim == 2 and ev.shape[-1] else np.zeros(len(ev))
    return {"stability": [str(s) for s in np.asarray(r.stability, dtype=object).ravel()],
            "spectral_radius": floats(rho)}


# ---------------------------------------------------------------------- overlays
def _by_index(runs: Runs, draw: Callable[..., Any], values: Callable[[Any], Any]) -> None:
    """One curve per run of ``values(result)`` (k,) against the index 1..k."""
    for name, r in runs:
        y = np.asarray(values(r), dtype=float).reshape(-1)  # (k,)
        draw(np.arange(1, y.size + 1), y, marker=".", label=name)


def _overlay_spectra(runs: Runs, ax: Any) -> None:
    _by_index(runs, ax.semilogy, lambda r: median_curve(r.singular_values))
    ax.set_xlabel("singular value index")
    ax.set_ylabel("median singular value of J_t")


def _overlay_gradient_flow(runs: Runs, ax: Any) -> None:
    for name, r in runs:
        y = median_curve(r.norms)  # (L,)
        lags = np.asarray(r.lags, dtype=float).reshape(-1)[: y.size]
        if r.log_norms is not None and not np.all(np.isfinite(y) & (y > 0)):
            # beyond float64's range: draw the exact logs on a linear axis
            y = median_curve(r.log_norms) / np.log(10.0)
            ax.plot(lags, y[: lags.size], label=name)
            ax.set_ylabel("log10 of median ||d s_T / d s_t||")
        else:
            ax.semilogy(lags, y[: lags.size], label=name)
            ax.set_ylabel("median ||d s_T / d s_t||")
    ax.set_xlabel("lag T - t (steps)")


def _overlay_lyapunov(runs: Runs, ax: Any) -> None:
    _by_index(runs, ax.plot, lambda r: r.exponents)
    ax.axhline(0.0, color="0.5", lw=0.8)
    ax.set_xlabel("exponent index")
    ax.set_ylabel("Lyapunov exponent (per step)")


def _overlay_pca(runs: Runs, ax: Any, max_components: int = 30) -> None:
    """Cumulative variance over the whole covariance spectrum of each run (comparable across
    runs, unlike the axes themselves)."""
    for name, r in runs:
        y = np.asarray(r.cumulative, dtype=float)[:max_components]  # (<= 30,)
        ax.plot(np.arange(1, y.size + 1), y, "o-", ms=3,
                label=f"{name} (participation ratio {float(r.participation_ratio):.3g})")
    ax.axhline(0.9, color="0.6", lw=0.8, ls=":")
    ax.set_xlabel("number of components")
    ax.set_ylabel("cumulative explained variance")
    ax.set_ylim(0, 1.02)


def _overlay_fixed_points(runs: Runs, ax: Any) -> None:
    from matplotlib.ticker import MaxNLocator

    width = 0.8 / max(len(runs), 1)
    x = np.arange(len(STABILITY_CLASSES))
    for i, (name, r) in enumerate(runs):
        figs = _figures_fixed_points(r)
        counts = [figs.get(f"fixed_points_{c}", 0) for c in STABILITY_CLASSES]
        ax.bar(x + (i - (len(runs) - 1) / 2) * width, counts, width=width, label=name)
    ax.set_xticks(x, STABILITY_CLASSES)
    ax.set_ylabel("number of points")
    ax.yaxis.set_major_locator(MaxNLocator(integer=True))


def _overlay_memory(runs: Runs, ax: Any) -> None:
    for name, r in runs:
        y = median_curve(r.scores)  # (L,)
        lags = np.asarray(r.lags, dtype=float).reshape(-1)[: y.size]
        ax.plot(lags, y[: lags.size], marker=".", label=name)
    ax.set_xlabel("lag k (steps)")
    ax.set_ylabel(str(runs[0][1].score_name or "memory score"))
    levels = {float(r.threshold) for _, r in runs}
    if all(r.chance is None for _, r in runs) and len(levels) == 1 \
            and np.isfinite(next(iter(levels))):
        ax.axhline(next(iter(levels)), ls="--", color="0.5", lw=0.8, label="span threshold")


# ---------------------------------------------------------------------- report drawings
def _plot_and(label: str, extra: Callable[[Any, Any], Any]) -> Callable[..., list[Drawing]]:
    """Drawings of a result: its ``.plot``, and with extras ``extra(result, ax)`` as ``label``."""
    def drawings(r: Any, others: Mapping[str, Any], *, extras: bool = True) -> list[Drawing]:
        out = [Drawing("", lambda ax: r.plot(ax=ax))]
        if extras:
            out.append(Drawing(label, lambda ax: extra(r, ax)))
        return out

    return drawings


def _draw_pca(r: Any, others: Mapping[str, Any], *, extras: bool = True) -> list[Drawing]:
    # with labels the first figure is the condition means; the single trials beside it show
    # the spread the means hide
    out = [Drawing("condition means" if r.condition_means is not None else "",
                   lambda ax: r.plot(ax=ax))]
    if extras and r.condition_means is not None:
        out.append(Drawing("single trials by label",
                           lambda ax: r.plot(ax=ax, conditions=False, color_by="label")))
    if extras:
        out.append(Drawing("variance", lambda ax: r.plot_variance(ax=ax)))
    return out


_draw_lyapunov = _plot_and("spectrum", lambda r, ax: r.plot(ax=ax, kind="spectrum"))


def _draw_fixed_points(r: Any, others: Mapping[str, Any], *, extras: bool = True
                       ) -> list[Drawing]:
    # drawn on the PCA axes of the same run (the state has more than three units)
    axes = others.get("pca") if "pca" in others else getattr(others, "trace", None)
    return [Drawing("", lambda ax: r.plot(ax=ax, pca=axes))]


# ---------------------------------------------------------------------- set-up in words
def _first(results: Mapping[str, Any]) -> Any:
    return next(iter(results.values()))


def _setting_memory(results: Mapping[str, Any]) -> str:
    modes = {r.mode for r in results.values()}
    if modes == {"probe"}:
        r = _first(results)
        meta = r.metadata or {}
        return (f"Measured in probe mode: i.i.d. Gaussian inputs of standard deviation "
                f"{meta.get('scale', 1.0):g} on every feature, {meta.get('n_sequences')} "
                f"sequences of {meta.get('n_steps')} steps (not the inputs above); "
                f"{r.method} method, span threshold {r.threshold:g}.")
    if modes == {"data"}:
        return "Measured in data mode on the inputs above; read it against the baseline."
    return ""


def _setting_fixed_points(results: Mapping[str, Any]) -> str:
    xs = [np.asarray(r.x) for r in results.values()]
    const = "held at zero on every feature" if not any(np.any(x) for x in xs) else \
        "held at the given constant value"
    starts = sorted({int(r.n_starts) for r in results.values()})
    return (f"Constant input {const}; {', '.join(map(str, starts))} starting states sampled "
            "from the recorded states.")


def _setting_pca(results: Mapping[str, Any]) -> str:
    r = _first(results)
    words = [f"Axes fitted on {r.fit_description} of the recorded states"]
    if getattr(r, "condition_means", None) is not None:
        what = ", ".join(r.condition_names[:8]) + (", ..." if len(r.conditions) > 8 else "")
        aligned = " aligned to each sequence's onset" if r.onsets is not None else ""
        words.append(f"lines are the mean trajectories of {len(r.conditions)} conditions "
                     f"({what}){aligned}; means hide the trial-to-trial spread around them")
    note = (r.metadata or {}).get("labels_note")
    if note:
        words.append(note)
    return "; ".join(words) + "."


def _setting_lyapunov(results: Mapping[str, Any]) -> str:
    r = _first(results)
    return (f"QR method driven by the inputs above: {r.warmup} warm-up steps, then "
            f"{r.n_steps} counted steps per sequence; exponents are the mean over sequences, "
            "natural log per step.")


# ---------------------------------------------------------------------- the specs
def _spec(name: str, function: str, **kw: Any) -> AnalysisSpec:
    return add_spec(AnalysisSpec(name=name, function=function, adapter=ADAPTERS.get(name), **kw))


_spec(
    "spectra", "hiddenlens._analyses.spectra:jacobian_spectra",
    title="Jacobian singular-value spectra",
    key_figures=_figures_spectra,
    figures={"top_singular_value_median": Figure("median top singular value"),
             "spectral_radius_median": Figure("median spectral radius")},
    caution="Singular values of the step Jacobians are taken along the recorded trajectory: "
            "they describe the dynamics on these inputs, not the network everywhere.",
    budget=_budget_spectra, phrases=_spectra_words, arrays=_arrays_spectra,
    overlay=_overlay_spectra)
_spec(
    "gradient_flow", "hiddenlens._analyses.gradient_flow:gradient_flow",
    title="Gradient flow over lag",
    key_figures=_figures_gradient_flow,
    figures={"gradient_rate": Figure("gradient log-rate", "per step"),
             "gradient_half_life": Figure("gradient half-life", "steps"),
             "gradient_verdict": Figure("gradient verdict"),
             "gradient_lags": Figure("gradient lags fitted", "lags")},
    caution="The verdict (vanishing / near-isometric / exploding) is a heuristic read off a "
            "fitted rate with fixed thresholds, not a proof about training.",
    budget=_budget_gradient_flow, phrases=_gradient_words, arrays=_arrays_gradient_flow,
    overlay=_overlay_gradient_flow)
_spec(
    "lyapunov", "hiddenlens._analyses.lyapunov:lyapunov_spectrum",
    title="Lyapunov spectrum",
    key_figures=_figures_lyapunov,
    figures={"lyapunov_max": Figure("largest Lyapunov exponent", "per step"),
             "kaplan_yorke_dimension": Figure("Kaplan-Yorke dimension"),
             "lyapunov_steps": Figure("Lyapunov counted steps", "steps"),
             "lyapunov_state_growth": Figure("state norm growth (last half)", "log per step")},
    caution="Finite-time Lyapunov exponents of an input-driven network depend on the input "
            "statistics and on the number of steps; they are estimates, not properties of the "
            "weights alone.",
    budget=_budget_lyapunov, phrases=_lyapunov_words,
    arrays=lambda r: {"exponents": floats(r.exponents)},
    overlay=_overlay_lyapunov, drawings=_draw_lyapunov, setting=_setting_lyapunov)
_spec(
    "pca", "hiddenlens._analyses.pca:pca_analysis",
    title="PCA trajectories and participation ratio",
    key_figures=_figures_pca,
    figures={"participation_ratio": Figure("participation ratio")},
    caution="PCA axes are fitted to each run separately: axes of two runs are comparable only "
            "when both are projected into one basis.",
    budget=_budget_pca, phrases=_pca_words,
    arrays=_arrays_pca, overlay=_overlay_pca, drawings=_draw_pca, setting=_setting_pca,
    uses=("targets", "onsets"))
_spec(
    "fixed_points", "hiddenlens._analyses.fixed_points:find_fixed_points",
    title="Fixed points and their stability",
    key_figures=_figures_fixed_points,
    figures={**{f"fixed_points_{c}": Figure(f"{c} {'points' if c == 'saddle' else 'fixed points'}")
                for c in STABILITY_CLASSES},
             "fixed_points_outside": Figure("points outside the recorded states"),
             "slow_set_dimension": Figure("slow-set dimension")},
    caution="Fixed points depend on the constant input chosen (zero unless stated); slow "
            "points are not fixed points, and the search finds only what its starting states "
            "lead to.",
    budget=_budget_fixed_points, phrases=_fixed_point_words, arrays=_arrays_fixed_points,
    overlay=_overlay_fixed_points, drawings=_draw_fixed_points, setting=_setting_fixed_points)
_spec(
    "memory", "hiddenlens._analyses.memory:memory_curve",
    title="Memory span",
    key_figures=_figures_memory,
    figures={"memory_span": Figure("memory span", "steps"),
             "memory_capacity": Figure("memory capacity"),
             "memory_max_lag": Figure("longest memory lag tried", "steps")},
    caution="Linear decoding gives a lower bound on what the state holds; the span threshold "
            "is a convention, and the answer depends on the probe input distribution.",
    budget=_budget_memory, phrases=_memory_words,
    arrays=lambda r: {"lags": floats(r.lags), "scores": floats(median_curve(r.scores))},
    overlay=_overlay_memory, setting=_setting_memory)
_spec(
    "task_memory", "hiddenlens._analyses.task_memory:task_memory_analysis",
    title="Task-variable memory",
    key_figures=_figures_task_memory,
    figures={"task_memory_span": Figure("task-variable span", "steps"),
             "task_memory_peak": Figure("task-variable peak decoding score"),
             "task_memory_chance": Figure("task-variable chance at the peak"),
             "task_memory_max_lag": Figure("longest task lag tried", "steps"),
             "task_memory_score": Figure("task-variable score")},
    caution="Linear decoding is a lower bound on what the state holds of the task variable; "
            "the chance band comes from a finite number of permutations at a per-lag level, so "
            "a lag can pass it by luck, and the span is the last lag of the first run above "
            "the band.",
    budget=_budget_task_memory, phrases=_task_memory_words,
    arrays=lambda r: {"lags": floats(r.lags), "scores": floats(r.scores),
                      "chance": floats(r.chance), "band": floats(r.band)},
    needs=("targets",), uses=("onsets",))

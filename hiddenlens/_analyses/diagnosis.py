"""One diagnosis line per run: the task outcome the user measured, read together with the
key figures of the analyses, in plain words (no printing, no plotting)."""

from __future__ import annotations

import math
import numbers
from collections.abc import Iterable, Mapping, Sequence
from dataclasses import dataclass, field
from typing import Any

from .._core.results import frozen_mapping

__all__ = [
    "Diagnosis",
    "LEVELS",
    "TERMS",
    "describe_figure",
    "diagnose",
    "rank_runs",
    "wilson_interval",
]

#: Diagnosis levels, best first.
LEVELS = ("ok", "marginal", "failing", "unknown")

#: One term per quantity, used in every sentence (key of :func:`key_figures` -> words).
TERMS: Mapping[str, str] = frozen_mapping({
    "lyapunov_max": "largest Lyapunov exponent",
    "kaplan_yorke_dimension": "Kaplan-Yorke dimension",
    "gradient_rate": "gradient decay rate",
    "gradient_half_life": "gradient half-life",
    "gradient_verdict": "gradient flow",
    "memory_span": "memory span (i.i.d. probe inputs)",
    "task_memory_span": "task memory span",
    "memory_capacity": "memory capacity",
    "memory_max_lag": "longest memory lag tried",
    "participation_ratio": "participation ratio",
    "fixed_points_stable": "stable fixed points",
    "fixed_points_saddle": "saddle points",
    "fixed_points_unstable": "unstable fixed points",
    "fixed_points_marginal": "marginal fixed points",
    "fixed_point_norm": "fixed point location",
    "top_singular_value_median": "one-step stretch (median top singular value)",
    "spectral_radius_median": "spectral radius (median)",
    "accuracy": "task accuracy",
    "loss": "task loss",
    "r2": "task R\u00b2",
})

# Thresholds (documented in docs/diagnosis.md). A fall of the gradient norm over the task's
# horizon below _FALL_OK is taken as fine, up to _FALL_FAIL as marginal, beyond as failing.
_FALL_OK = 10.0
_FALL_FAIL = 1e3
# Chance-adjusted accuracy (or R²) at or above which the task is solved / half solved.
_SOLVED = 0.9
_PARTLY = 0.5
# Lags for a 10x change beyond which a rate is read as "no change over the lags seen".
_FLAT_STEPS = 1e4
# Lyapunov exponents within this band of 0 (per step) are "near the edge of chaos".
_EDGE = 0.01


# ---------------------------------------------------------------------- words
def _num(v: float) -> str:
    """3 significant digits, without exponent notation for ordinary sizes."""
    a = abs(v)
    if a != 0 and (a >= 1e5 or a < 1e-3):
        return f"{v:.2e}"
    return f"{v:.3g}"


def _steps(v: float) -> str:
    return f"{v:.0f}" if v >= 10 else f"{v:.2g}"


def _plural(n: float, word: str) -> str:
    return f"{word}" if n == 1 else f"{word}s"


def _pair(interval: Any) -> tuple[float, float]:
    """``interval`` as (low, high) floats, or a ValueError saying what an interval is."""
    try:
        lo, hi = (float(x) for x in interval)
    except (TypeError, ValueError):
        raise ValueError(f"interval must be a pair (low, high) of numbers, got "
                         f"{interval!r}") from None
    return lo, hi


def _interval_words(interval: Sequence[float] | None, fmt=_num) -> str:
    if interval is None:
        return ""
    lo, hi = _pair(interval)
    if not (math.isfinite(lo) and math.isfinite(hi)):
        return ""
    return f" (95% interval {fmt(lo)} to {fmt(hi)})"


def _percent(v: float) -> str:
    return f"{100 * v:.1f}%"


def describe_figure(key: str, value: Any, interval: Sequence[float] | None = None, *,
                    limit: float | None = None) -> str:
    """A key figure as a readable phrase that starts with its one term.

    Parameters
    ----------
    key : str
        A key of :func:`hiddenlens._faces.summary.key_figures` (or ``accuracy``, ``loss``, ``r2``,
        ``task_memory_span``).
    value : float, int, str or None
    interval : (float, float), optional
        A 95% interval to quote beside the value.
    limit : float, optional
        For memory spans: the longest lag tried (a span that reaches it is a lower bound).

    Returns
    -------
    str
        E.g. ``"gradient half-life: no decay over the lags seen"``; never ``inf``, ``nan`` or a
        bare zero where zero means "none".
    """
    if not isinstance(key, str):
        raise TypeError(f"key must be a str such as 'gradient_rate', got {type(key).__name__}")
    term = TERMS.get(key, key.replace("_", " "))
    if value is None:
        return f"{term}: not computed"
    if isinstance(value, str):
        return f"{term}: {value}"
    try:
        v = float(value)
    except (TypeError, ValueError):
        raise TypeError(f"value of {key!r} must be a number or a str, got "
                        f"{type(value).__name__}") from None
    iv = _interval_words(interval)
    if math.isnan(v):
        return f"{term}: could not be measured (no finite value)"
    describe = _DESCRIBERS.get(key)
    if describe is None and key.startswith("fixed_points_"):
        describe = _fixed_point_count
    if describe is None:
        describe = _plain_figure
    return describe(term, v, iv, interval, limit)


# One describer per figure key: (term, finite-or-infinite value, interval words, interval,
# limit) -> phrase. NaN, None and str values are handled before these are called.
def _gradient_rate(term, v, iv, interval, limit):
    if v == -math.inf:
        return f"{term}: gradients vanish within one step"
    if v == math.inf:
        return f"{term}: gradients overflow within one step"
    every = math.log(10.0) / abs(v) if v != 0 else math.inf
    if every > _FLAT_STEPS:
        return f"{term}: no decay over the lags seen"
    word = "fall" if v < 0 else "grow"
    return f"{term}: gradients {word} 10x every {_steps(every)} steps{iv}"


def _gradient_half_life(term, v, iv, interval, limit):
    if v == math.inf or v > _FLAT_STEPS:
        return f"{term}: no decay over the lags seen"
    if v <= 0:
        return f"{term}: gradients vanish within one step"
    return f"{term}: gradients halve every {_steps(v)} steps{iv}"


def _memory_span(term, v, iv, interval, limit):
    if v < 0:
        return f"{term}: nothing decodable, even the current input"
    if limit is not None and math.isfinite(limit) and v >= limit:
        return f"{term}: at least {v:.0f} steps (the longest lag tried)"
    if v == 0:
        return f"{term}: only the current input is decodable (no step back)"
    return f"{term}: {v:.0f} {_plural(v, 'step')}{iv}"


def _memory_max_lag(term, v, iv, interval, limit):
    return f"{term}: {v:.0f} {_plural(v, 'step')}"


def _kaplan_yorke(term, v, iv, interval, limit):
    if v == 0:
        return f"{term}: no expanding direction (every exponent is negative)"
    return f"{term}: {_num(v)}{iv}"


def _lyapunov_max(term, v, iv, interval, limit):
    if math.isinf(v):
        return f"{term}: states {'overflow' if v > 0 else 'collapse'} (no finite exponent)"
    kind = ("chaotic on these inputs" if v > _EDGE else
            "near the edge of chaos" if v > -_EDGE else "contracting")
    return f"{term}: {v:+.3g} per step, {kind}{iv}"


def _fixed_point_count(term, v, iv, interval, limit):
    n = int(v)
    return f"{term}: none found" if n == 0 else f"{term}: {n}"


def _fixed_point_norm(term, v, iv, interval, limit):
    if v == 0:
        return f"{term}: at the origin"
    return f"{term}: {_num(v)} from the origin"


def _participation_ratio(term, v, iv, interval, limit):
    return f"{term}: {v:.3g}{iv}"


def _top_singular_value(term, v, iv, interval, limit):
    if math.isinf(v):
        return f"{term}: states overflow"
    return f"{term}: one step stretches states by up to {_num(v)}x{iv}"


def _accuracy(term, v, iv, interval, limit):
    return f"{term}: {_percent(v)}{_interval_words(interval, _percent)}"


def _plain_figure(term, v, iv, interval, limit):
    if math.isinf(v):
        return f"{term}: {'beyond any finite value' if v > 0 else 'below any finite value'}"
    return f"{term}: {_num(v)}{iv}"


_DESCRIBERS = {
    "gradient_rate": _gradient_rate,
    "gradient_half_life": _gradient_half_life,
    "memory_span": _memory_span,
    "task_memory_span": _memory_span,
    "memory_max_lag": _memory_max_lag,
    "kaplan_yorke_dimension": _kaplan_yorke,
    "lyapunov_max": _lyapunov_max,
    "fixed_point_norm": _fixed_point_norm,
    "participation_ratio": _participation_ratio,
    "top_singular_value_median": _top_singular_value,
    "accuracy": _accuracy,
}


# ---------------------------------------------------------------------- noise
def wilson_interval(successes: float, n: int, z: float = 1.959963984540054) -> tuple[float, float]:
    """Wilson score interval of a proportion (Wilson 1927, JASA 22:209); 95% by default."""
    if n <= 0:
        raise ValueError(f"n must be a positive count of evaluated decisions, got {n!r}")
    p = successes / n
    denom = 1 + z * z / n
    centre = (p + z * z / (2 * n)) / denom
    half = z * math.sqrt(p * (1 - p) / n + z * z / (4 * n * n)) / denom
    return (max(0.0, centre - half), min(1.0, centre + half))


# ---------------------------------------------------------------------- result
@dataclass(frozen=True, eq=False)
class Diagnosis:
    """One run's diagnosis.

    Attributes
    ----------
    name : str or None
        Run name.
    level : str
        One of :data:`LEVELS`: "ok", "marginal", "failing", "unknown".
    text : str
        The diagnosis line.
    reasons : tuple of str
        The clauses the level rests on.
    warnings : tuple of str
        Contradictions between figures and the task outcome, and degenerate settings.
    suggestions : tuple of str
        What may be worth trying (careful words: suggestions, not promises).
    score : float or None
        The task score used for ranking (chance-adjusted accuracy or R², else -loss).
    interval : (float, float) or None
        95% interval of ``score`` where the task metrics allow one.
    figures, task : mapping
        The inputs, read-only.
    """

    name: str | None
    level: str
    text: str
    reasons: tuple[str, ...]
    warnings: tuple[str, ...]
    suggestions: tuple[str, ...]
    score: float | None
    interval: tuple[float, float] | None
    figures: Mapping[str, Any] = field(repr=False)
    task: Mapping[str, Any] = field(repr=False)

    def to_dict(self) -> dict[str, Any]:
        """JSON-ready copy (lists and plain numbers)."""
        return {
            "name": self.name, "level": self.level, "text": self.text,
            "reasons": list(self.reasons), "warnings": list(self.warnings),
            "suggestions": list(self.suggestions), "score": self.score,
            "interval": None if self.interval is None else list(self.interval),
            "task": dict(self.task), "figures": dict(self.figures),
        }

    def __str__(self) -> str:
        return self.text


def _finite(x: Any) -> float | None:
    if x is None or isinstance(x, (str, bool)):
        return None
    try:
        v = float(x)
    except (TypeError, ValueError):
        return None
    return v if math.isfinite(v) else None


_TASK_KEYS = {"accuracy", "loss", "chance", "r2", "rmse", "n_eval", "accuracy_interval",
              "horizon", "kind", "accuracy_by_delay", "task"}


def _check_task(task: Any) -> dict[str, Any]:
    if task is None:
        return {}
    if not isinstance(task, Mapping):
        raise TypeError("task must be a mapping such as {'accuracy': 0.93, 'chance': 1/3}, got "
                        f"{type(task).__name__}")
    out = dict(task)
    if "eval_loss" in out and "loss" not in out:
        out["loss"] = out.pop("eval_loss")
    for k in ("accuracy", "chance"):
        v = out.get(k)
        if v is not None and (isinstance(v, bool) or not isinstance(v, numbers.Real)
                              or not 0.0 <= float(v) <= 1.0):
            raise ValueError(f"task[{k!r}] must be a fraction in [0, 1], got {v!r}; "
                             "pass e.g. 0.93 for 93%")
    ci = out.get("accuracy_interval")
    if ci is not None:
        if len(ci) != 2 or not float(ci[0]) <= float(ci[1]):
            raise ValueError(f"task['accuracy_interval'] must be (low, high) with low <= high, "
                             f"got {ci!r}")
        out["accuracy_interval"] = (float(ci[0]), float(ci[1]))
    n = out.get("n_eval")
    if n is not None and (isinstance(n, bool) or not isinstance(n, numbers.Integral) or n <= 0):
        raise ValueError(f"task['n_eval'] must be a positive int (evaluated decisions), got {n!r}")
    return out


def _task_outcome(task: Mapping[str, Any]) -> tuple[str | None, float | None,
                                                     tuple[float, float] | None, str | None]:
    """(level, score, interval, words) of the task metrics."""
    acc = _finite(task.get("accuracy"))
    if acc is not None:
        chance = _finite(task.get("chance"))
        c = chance if chance is not None and chance < 1 else 0.0
        adj = (acc - c) / (1 - c)
        ci = task.get("accuracy_interval")
        if ci is None and task.get("n_eval"):
            ci = wilson_interval(acc * task["n_eval"], int(task["n_eval"]))
        interval = None if ci is None else ((ci[0] - c) / (1 - c), (ci[1] - c) / (1 - c))
        words = f"accuracy {_percent(acc)}"
        if ci is not None:
            words += f" ({_percent(ci[0])} to {_percent(ci[1])})"
        if chance is not None:
            words += f", chance {_percent(chance)}"
        level = "ok" if adj >= _SOLVED else "marginal" if adj >= _PARTLY else "failing"
        return level, adj, interval, words
    r2 = _finite(task.get("r2"))
    if r2 is not None:
        level = "ok" if r2 >= _SOLVED else "marginal" if r2 >= _PARTLY else "failing"
        return level, r2, None, f"R\u00b2 {r2:.3g}"
    loss = _finite(task.get("loss"))
    if loss is not None:
        return None, -loss, None, f"loss {_num(loss)}"
    return None, None, None, None


def _gradient_clause(figures: Mapping[str, Any], horizon: float | None
                     ) -> tuple[str | None, str | None, str | None]:
    """(level, clause, direction) of the gradient rate read against the horizon."""
    rate = figures.get("gradient_rate")
    hl = _finite(figures.get("gradient_half_life"))
    if rate is None and hl is not None and hl > 0:
        rate = -math.log(2.0) / hl  # the half-life alone gives the rate of a decay
    elif rate is None and figures.get("gradient_half_life") == math.inf:
        rate = 0.0
    r = None if rate is None or isinstance(rate, str) else float(rate)
    if r is None or math.isnan(r):
        if rate is not None or figures.get("gradient_verdict") == "undetermined":
            return "unknown", "gradient decay rate could not be measured", None
        return None, None, None
    if math.isinf(r):
        return ("failing", "gradients vanish within one step" if r < 0
                else "gradients overflow within one step", "down" if r < 0 else "up")
    every = math.log(10.0) / abs(r) if r != 0 else math.inf
    direction = "down" if r < 0 else "up"
    if every > _FLAT_STEPS:
        return "ok", "gradients keep their size over the lags seen", None
    word = "fall" if r < 0 else "grow"
    clause = f"gradients {word} 10x over {_steps(every)} steps"
    if horizon is None:
        return None, clause, direction
    change = math.exp(abs(r) * horizon)  # factor over the horizon
    level = "ok" if change < _FALL_OK else "marginal" if change <= _FALL_FAIL else "failing"
    if r > 0 and level != "ok":  # growth over the horizon is explosion, not a short memory
        return level, (f"{clause}: they explode over the task's {horizon:.0f} steps "
                       f"({level})"), direction
    return level, f"{clause}; the task needs {horizon:.0f}: {level}", direction


def _degenerate(figures: Mapping[str, Any], settings: Mapping[str, Mapping[str, Any]],
                horizon: float | None) -> list[str]:
    out: list[str] = []
    for key, v in figures.items():
        if isinstance(v, float) and math.isnan(v):
            out.append(f"{TERMS.get(key, key)} could not be measured (no finite value); "
                       "its analysis may have met overflow or too few samples")
    lag = _finite(figures.get("memory_max_lag"))
    if lag is not None and horizon is not None and lag < horizon:
        out.append(f"memory lags were tried only up to {lag:.0f} steps, short of the task's "
                   f"{horizon:.0f}; raise max_lag to see the whole horizon")
    lya = settings.get("lyapunov", {})
    warm, steps = lya.get("warmup"), lya.get("n_steps")
    if warm is not None and steps:
        left = int(steps) - int(warm)
        if left < max(10, 0.1 * int(steps)):
            out.append(f"Lyapunov exponents averaged over {left} of {int(steps)} steps after "
                       f"a warm-up of {int(warm)}: too few to quote")
    fp = settings.get("fixed_points", {})
    if fp.get("n_starts") is not None and int(fp["n_starts"]) < 8:
        out.append(f"fixed-point search from only {int(fp['n_starts'])} starts: counts are "
                   "a lower bound")
    gf = settings.get("gradient_flow", {})
    if gf.get("max_lag") is not None and horizon is not None and int(gf["max_lag"]) < horizon:
        out.append(f"gradient norms measured up to lag {int(gf['max_lag'])}, short of the "
                   f"task's {horizon:.0f} steps: the rate is extrapolated")
    return out


def diagnose(figures: Mapping[str, Any], *, task: Mapping[str, Any] | None = None,
             horizon: float | None = None, name: str | None = None,
             settings: Mapping[str, Mapping[str, Any]] | None = None) -> Diagnosis:
    """Read one run's key figures together with its task outcome.

    Parameters
    ----------
    figures : Mapping[str, float | int | str]
        The key figures of :func:`hiddenlens._faces.summary.key_figures` (absent keys are fine).
        ``task_memory_span`` (the span of the task's own variable) is used when present.
    task : Mapping, optional
        Task metrics the user measured: ``accuracy`` (fraction), ``chance`` (chance accuracy),
        ``loss``, ``r2``, and for noise either ``n_eval`` (number of evaluated decisions: a
        Wilson interval is formed) or ``accuracy_interval`` (low, high). ``horizon`` may be
        given here too.
    horizon : float, optional
        Steps the task needs the state to carry information (e.g. the longest delay).
    name : str, optional
        Run name, first in the line.
    settings : Mapping[str, Mapping], optional
        Options the figures came from, per analysis (e.g. ``{"lyapunov": {"warmup": 199,
        "n_steps": 200}}``), to flag degenerate settings.

    Returns
    -------
    Diagnosis
        ``level`` is the task's when task metrics are given (the outcome is what was asked
        for), else the gradient reading against the horizon, else "unknown".

    Notes
    -----
    Thresholds and cautions: docs/diagnosis.md. The words are careful by design: figures of
    a trained network along recorded inputs describe those trajectories, not training.
    """
    if not isinstance(figures, Mapping):
        raise TypeError("figures must be a mapping of key figures (from key_figures()), got "
                        f"{type(figures).__name__}")
    t = _check_task(task)
    horizon = _check_horizon(t.get("horizon") if horizon is None else horizon)
    if name is not None and not isinstance(name, str):
        raise TypeError(f"name must be a str, got {type(name).__name__}")
    settings = _check_settings(settings)

    task_level, score, interval, task_words = _task_outcome(t)
    g_level, g_clause, g_dir = _gradient_clause(figures, horizon)
    lam, unbounded, dynamics_words = _dynamics_reading(figures)
    chaotic = lam is not None and lam > _EDGE
    span_key, span, limit = _span_reading(figures)
    solved = task_level == "ok"

    reasons = [r for r in (task_words, g_clause, dynamics_words) if r]
    if span is not None:
        reasons.append(describe_figure(span_key, span, limit=limit))
    if span_key == "task_memory_span" and span is not None and horizon is not None \
            and span < horizon and not solved:
        reasons.append(f"the state holds the task's variable for {span:.0f} of the "
                       f"{horizon:.0f} steps the task needs")
    short_span = span_key == "memory_span" and span is not None and horizon is not None \
        and span < horizon and (limit is None or span < limit)
    warnings = _contradictions(task_level, g_level, chaotic, unbounded,
                               span if short_span else None, horizon)
    warnings.extend(_degenerate(figures, settings, horizon))

    level = task_level or g_level or "unknown"
    suggestions = _suggestions(level, g_level, g_dir, chaotic, horizon)

    head = f"{name}: {level}" if name else level
    text = head + (": " + "; ".join(reasons) if reasons else ": no task metrics or figures")
    if warnings:
        text += f" ({len(warnings)} {_plural(len(warnings), 'caution')})"
    return Diagnosis(
        name=name, level=level, text=text, reasons=tuple(reasons), warnings=tuple(warnings),
        suggestions=tuple(suggestions), score=score, interval=interval,
        figures=frozen_mapping(dict(figures)), task=frozen_mapping(t),
    )


def _check_horizon(horizon: Any) -> float | None:
    """The task's horizon as a float, or a ValueError saying what a horizon is."""
    if horizon is None:
        return None
    if isinstance(horizon, bool) or not isinstance(horizon, numbers.Real) \
            or not math.isfinite(horizon) or horizon <= 0:
        raise ValueError(f"horizon must be a positive number of steps, got {horizon!r}; "
                         "pass e.g. the task's longest delay")
    return float(horizon)


def _check_settings(settings: Any) -> dict[str, Mapping[str, Any]]:
    """A plain dict of the per-analysis options, or a TypeError saying what is expected."""
    if settings is not None and not (isinstance(settings, Mapping) and all(
            isinstance(v, Mapping) for v in settings.values())):
        raise TypeError("settings must be a mapping analysis name -> options used (e.g. "
                        "{'lyapunov': {'warmup': 50}}), got "
                        f"{type(settings).__name__}")
    return dict(settings or {})


def _dynamics_reading(figures: Mapping[str, Any]) -> tuple[float | None, bool, str | None]:
    """(largest exponent or None, unbounded growth?, clause) of the Lyapunov figures.

    Along states that grow without bound a positive exponent is divergence, not chaos: the
    exponent is then returned as None so that nothing reads it as chaotic.
    """
    lam = _finite(figures.get("lyapunov_max"))
    growth = _finite(figures.get("lyapunov_state_growth"))
    from .lyapunov import is_unbounded

    if lam is not None and is_unbounded(growth, figures.get("lyapunov_steps")):
        return None, True, (f"the states grow without bound along these inputs (~x"
                            f"{math.exp(growth):.3g} per step; largest Lyapunov exponent "
                            f"{lam:+.3g} per step: divergence, not chaos)")
    if lam is not None and lam > _EDGE:
        return lam, False, (f"chaotic on these inputs (largest Lyapunov exponent {lam:+.3g} "
                            "per step)")
    return lam, False, None


def _span_reading(figures: Mapping[str, Any]) -> tuple[str, float | None, float | None]:
    """(key of the span used, span, longest lag tried): the task's own span when present."""
    limit = _finite(figures.get("memory_max_lag"))
    span_key = "task_memory_span" if figures.get("task_memory_span") is not None \
        else "memory_span"
    return span_key, _finite(figures.get(span_key)), limit


def _contradictions(task_level: str | None, g_level: str | None, chaotic: bool,
                    unbounded: bool, short_span: float | None, horizon: float | None
                    ) -> list[str]:
    """Cautions where the figures and the task outcome disagree.

    ``short_span`` is the probe-input memory span where it falls short of the horizon (and of
    the longest lag tried), else None.
    """
    out: list[str] = []
    solved = task_level == "ok"
    if solved and short_span is not None:
        out.append(
            f"the memory span ({short_span:.0f} {_plural(short_span, 'step')} on i.i.d. probe "
            f"inputs) is below the task's {horizon:.0f} steps although the task is solved: the "
            "probe-based span does not measure the variable this task stores; use task_memory "
            "on the task's own inputs and target for a span that does")
    if solved and g_level == "failing":
        out.append(
            "the gradient reading says failing, yet the task is solved: the rate is a "
            "straight-line fit along these recorded inputs and may miss the few directions "
            "that carry the task's variable (gated cells keep them apart); read it as a "
            "statement about these trajectories, not about training")
    if solved and chaotic:
        out.append("chaotic on these inputs, yet the task is solved: the exponent is an "
                   "average along the recorded inputs and need not bear on the readout")
    if task_level == "failing" and g_level == "ok" and not unbounded and not chaotic:
        out.append("the dynamics figures do not explain the failure; the readout, the "
                   "training length or the learning rate may be the limit")
    return out


def _suggestions(level: str, g_level: str | None, g_dir: str | None, chaotic: bool,
                 horizon: float | None) -> list[str]:
    """What may be worth trying for a marginal or failing run (none for the others)."""
    if level not in ("marginal", "failing"):
        return []
    out: list[str] = []
    if g_dir == "down" and g_level in ("marginal", "failing"):
        out.append("a gated cell (GRU or LSTM), or an initial recurrent gain nearer "
                   "1, may let gradients reach further back")
    if g_dir == "up" or chaotic:
        out.append("a lower initial recurrent gain, gradient-norm clipping or a "
                   "gated cell may calm the expanding dynamics")
    if not out and horizon is not None:
        out.append("training on short delays first and lengthening them may help")
    if out:
        out.append("change one thing at a time and compare the runs")
    return out


def rank_runs(diagnoses: Iterable[Diagnosis]) -> list[tuple[int | None, Diagnosis]]:
    """Rank runs by task score; a run ranks above another only beyond noise.

    Competition ranking: a run's rank is 1 + the number of runs whose score is higher
    beyond noise, i.e. whose interval's low end is above this run's high end (without
    intervals, a plainly higher score). Runs within noise of each other share a rank. Runs
    with no task score are ranked by level, after every scored run; ``None`` when neither.

    Returns
    -------
    list of (rank, Diagnosis)
        Best first; ties keep the given order.
    """
    items = list(diagnoses)
    for d in items:
        if not isinstance(d, Diagnosis):
            raise TypeError(f"rank_runs takes Diagnosis objects (from diagnose()), got "
                            f"{type(d).__name__}")
    scored = [d for d in items if d.score is not None]
    rest = [d for d in items if d.score is None]

    def bounds(d: Diagnosis) -> tuple[float, float]:
        return d.interval if d.interval is not None else (d.score, d.score)

    ranks: dict[int, int | None] = {}
    for d in scored:
        hi = bounds(d)[1]
        ranks[id(d)] = 1 + sum(bounds(o)[0] > hi for o in scored if o is not d)
    base = len(scored)
    order = {lv: i for i, lv in enumerate(LEVELS)}
    for d in rest:
        if d.level == "unknown":
            ranks[id(d)] = None
        else:
            ranks[id(d)] = base + 1 + sum(order[o.level] < order[d.level] for o in rest
                                          if o.level != "unknown")
    out = sorted(items, key=lambda d: (ranks[id(d)] is None, ranks[id(d)] or 0))
    return [(ranks[id(d)], d) for d in out]

"""Key figures recorded during training: ``Monitor`` for a plain loop, a Lightning callback.

Every check wraps the model (weight copies: the model being trained is never touched), records
the fixed probe batch, runs the few analyses the chosen figures need with small budgets, and
puts bootstrap intervals on the figures from the same recording.
"""

from __future__ import annotations

import json
import math
import numbers
import os
import time
from collections.abc import Iterable, Mapping, Sequence
from typing import Any

import numpy as np

__all__ = ["Monitor", "probe_figures", "MONITOR_FIGURES", "DEFAULT_FIGURES"]

#: Figures a monitor, a timeline or a sweep can record, and the analysis behind each.
MONITOR_FIGURES: dict[str, str] = {
    "gradient_rate": "gradient_flow",
    "gradient_half_life": "gradient_flow",
    "top_singular_value_median": "spectra",
    "spectral_radius_median": "spectra",
    "lyapunov_max": "lyapunov",
    "kaplan_yorke_dimension": "lyapunov",
    "participation_ratio": "pca",
    "memory_span": "memory",
    "memory_capacity": "memory",
    "task_memory": "task_memory",
}
DEFAULT_FIGURES: tuple[str, ...] = (
    "gradient_rate", "top_singular_value_median", "lyapunov_max", "participation_ratio",
)
_COLUMNS = ["step", "figure", "value", "low", "high"]


def check_probe_inputs(inputs: Any, name: str) -> np.ndarray:
    """A private float copy of a probe batch (B, T, I): non-empty, finite."""
    x = inputs.detach().cpu().numpy() if hasattr(inputs, "detach") else np.asarray(inputs)
    if x.ndim != 3 or not np.issubdtype(x.dtype, np.floating):
        raise ValueError(f"{name} must be a float array of shape (B, T, I), got "
                         f"shape {x.shape} and dtype {x.dtype}")
    if 0 in x.shape[:2]:
        raise ValueError(f"{name} is empty (shape {x.shape}); pass at least one sequence of "
                         "at least one step")
    if not np.isfinite(x).all():
        where = tuple(int(i) for i in np.argwhere(~np.isfinite(x))[0])
        raise ValueError(f"{name} contains NaN or Inf (first at index {where}); clean the "
                         "probe batch first")
    return np.array(x)  # a writable copy the caller cannot change


def check_figures(figures: Any) -> tuple[str, ...]:
    if isinstance(figures, str):
        figures = (figures,)
    try:
        out = tuple(figures)
    except TypeError:
        raise TypeError(f"figures must be a sequence of figure names, got "
                        f"{type(figures).__name__}; e.g. figures={DEFAULT_FIGURES[:2]}") from None
    bad = [f for f in out if f not in MONITOR_FIGURES]
    if bad or not out:
        raise ValueError(f"unknown figures {bad or out}; choose among "
                         f"{', '.join(MONITOR_FIGURES)}")
    return out


def _budgets(figures: Sequence[str], T: int, S: int) -> dict[str, dict[str, Any]]:
    """Small budgets: one singular value and one exponent, at most 50 lags of gradient flow."""
    opts: dict[str, dict[str, Any]] = {}
    need = {MONITOR_FIGURES[f] for f in figures}
    if "spectra" in need:
        opts["spectra"] = {"k": 1, "radius": "spectral_radius_median" in figures}
        if S <= 128:  # a batched dense SVD beats the iterative methods for small states
            opts["spectra"]["method"] = "svd"
    if "lyapunov" in need:
        opts["lyapunov"] = {"k": None if "kaplan_yorke_dimension" in figures else 1}
    if "gradient_flow" in need:
        opts["gradient_flow"] = {"max_lag": max(1, min(T - 1, 50))}
    if "memory" in need:
        opts["memory"] = {"max_lag": 20, "n_steps": 20 + 300}
    return opts


def _task_memory_value(trace: Any, targets: Any) -> float:
    import hiddenlens

    fn = hiddenlens.task_memory  # AttributeError where it is not available
    r = fn(trace, targets)
    for attr in ("span", "capacity", "score"):
        v = getattr(r, attr, None)
        if v is not None:
            a = np.asarray(v, dtype=float)
            return float(np.nanmedian(a)) if a.size else math.nan
    raise TypeError("the task memory result has no span, capacity or score")


def probe_figures(model_or_system: Any, inputs: Any, figures: Sequence[str] = DEFAULT_FIGURES,
                  *, seed: int = 0, level: float = 0.9, n_boot: int = 100, targets: Any = None,
                  options: Mapping[str, Mapping[str, Any]] | None = None,
                  skipped: dict[str, str] | None = None) -> list[dict[str, Any]]:
    """Chosen key figures with bootstrap intervals on one probe batch, at small budgets.

    Returns
    -------
    list of dict
        One ``{"figure", "value", "low", "high"}`` per figure that could be computed; the
        others are named with the reason in ``skipped`` (when given).
    """
    from .._analyses.bootstrap import figure_intervals
    from .._analyses.runner import run_analyses
    from .._core.record import as_system
    from .._core.registry import available_analyses

    figures = check_figures(figures)
    x = inputs.detach().cpu().numpy() if hasattr(inputs, "detach") else np.asarray(inputs)
    system = as_system(model_or_system)  # weight copies, taken once per check
    opts = _budgets(figures, x.shape[-2], system.state_size)
    for a, o in (options or {}).items():
        opts.setdefault(a, {}).update(o)
    have = set(available_analyses())
    which = [a for a in dict.fromkeys(MONITOR_FIGURES[f] for f in figures)
             if a != "task_memory" and a in have]
    res = run_analyses(system, x, which=which,
                       options={a: opts[a] for a in which if a in opts}, seed=seed)
    fi = figure_intervals(res, level=level, n_boot=n_boot, seed=seed)
    rows = []
    for f in figures:
        if f == "task_memory":
            if targets is None:
                continue
            try:
                v = _task_memory_value(res.trace, targets)
            except AttributeError:
                if skipped is not None:
                    skipped[f] = "hiddenlens.task_memory is not available in this installation"
                continue
            rows.append({"figure": f, "value": v, "low": math.nan, "high": math.nan})
        elif f in fi:
            v, lo, hi = fi[f]
            rows.append({"figure": f, "value": v, "low": lo, "high": hi})
        elif skipped is not None:
            skipped[f] = f"the {MONITOR_FIGURES[f]} analysis gave no value"
    return rows


class Monitor:
    """Record key figures of a model on a fixed probe batch while it trains.

    Parameters
    ----------
    probe_inputs : Tensor or ndarray of shape (B, T, I)
        The fixed probe batch; the same sequences at every check, so that figures are
        comparable over steps.
    figures : sequence of str
        Names from :data:`MONITOR_FIGURES` (default: gradient log-rate, median top singular
        value, largest Lyapunov exponent, participation ratio). ``"task_memory"`` needs
        ``targets`` and ``hiddenlens.task_memory``.
    every : int, optional
        Check every this many steps (default 50 when ``budget`` is not given either).
    budget : float, optional
        Instead of ``every``: spend at most this fraction of the training time on checks
        (e.g. 0.05); a check runs when the time spent so far plus the last check's cost stays
        within it. The first step is always checked.
    targets : array-like, optional
        Targets of the probe batch, for ``"task_memory"``.
    seed : int, default 0
        Seed of the analyses and of the bootstrap (the same at every check).
    level : float, default 0.9
        Nominal coverage of the intervals.
    n_boot : int, default 100
        Bootstrap resamples per check.

    Attributes
    ----------
    timeline : pandas.DataFrame
        Columns step, figure, value, low, high; one row per figure and check.
    skipped : dict[str, str]
        Figures that could not be recorded, with the reason.
    seconds : float
        Wall time spent in checks.
    """

    def __init__(self, probe_inputs: Any, figures: Iterable[str] = DEFAULT_FIGURES, *,
                 every: int | None = None, budget: float | None = None, targets: Any = None,
                 seed: int = 0, level: float = 0.9, n_boot: int = 100) -> None:
        self.figures = check_figures(figures)
        if every is not None and budget is not None:
            raise ValueError("give every= (steps between checks) or budget= (fraction of the "
                             "training time), not both")
        if every is None and budget is None:
            every = 50
        if every is not None and (isinstance(every, bool) or not isinstance(every, numbers.Integral)
                                  or every < 1):
            raise ValueError(f"every must be a positive integer number of steps, got {every!r}")
        if budget is not None and (isinstance(budget, bool) or not isinstance(
                budget, numbers.Real) or not 0 < budget < 1):
            raise ValueError(f"budget must be a fraction of the training time in (0, 1), e.g. "
                             f"0.05, got {budget!r}")
        self.probe_inputs = check_probe_inputs(probe_inputs, "probe_inputs")
        self.every, self.budget = every, budget
        self.targets, self.seed, self.level, self.n_boot = targets, int(seed), level, n_boot
        self.skipped: dict[str, str] = {}
        self.seconds = 0.0
        self._rows: list[dict[str, Any]] = []
        self._start: float | None = None
        self._last_cost = 0.0
        self._sizes: tuple[int, int, int] | None = None  # (step, S, I) of the first check

    # ------------------------------------------------------------------ recording
    def due(self, step: int) -> bool:
        """Whether :meth:`step` would check at training step ``step``."""
        if self.every is not None:
            return step % self.every == 0
        if self._start is None:
            return True
        elapsed = time.perf_counter() - self._start
        return self.seconds + self._last_cost <= self.budget * elapsed

    def step(self, model: Any, step: int) -> bool:
        """Call once per training iteration; checks when due. Returns whether it checked."""
        if isinstance(step, bool) or not isinstance(step, (int, np.integer)):
            raise TypeError(f"step must be an integer training step, got {step!r}")
        now = time.perf_counter()
        if self._start is None:
            self._start = now
        if not self.due(int(step)):
            return False
        self.measure(model, int(step))
        return True

    def measure(self, model: Any, step: int) -> list[dict[str, Any]]:
        """Check now, whatever the schedule; the rows are appended to the timeline."""
        from .._core.record import as_system

        system = as_system(model)  # weight copies, taken once per check
        if self._sizes is None:
            self._sizes = (int(step), system.state_size, system.input_size)
        elif self._sizes[1:] != (system.state_size, system.input_size):
            first, S, I = self._sizes
            raise ValueError(
                f"the model's sizes changed between checks: S={S}, I={I} at step {first}, "
                f"S={system.state_size}, I={system.input_size} at step {step}; a timeline "
                "compares one architecture over training: start a new Monitor for the new one")
        t0 = time.perf_counter()
        try:
            rows = probe_figures(system, self.probe_inputs, self.figures, seed=self.seed,
                                 level=self.level, n_boot=self.n_boot, targets=self.targets,
                                 skipped=self.skipped)
        finally:
            self._last_cost = time.perf_counter() - t0
            self.seconds += self._last_cost
        for r in rows:
            self._rows.append({"step": int(step), **r})
        return rows

    @property
    def timeline(self):
        """pandas DataFrame with columns step, figure, value, low, high."""
        import pandas as pd

        return pd.DataFrame(self._rows, columns=_COLUMNS)

    # ------------------------------------------------------------------ files
    def save(self, path: str | os.PathLike) -> None:
        """Write the timeline to ``path``: ``.csv`` or ``.json`` (plain text, no pickle)."""
        p = os.fspath(path)
        if p.endswith(".csv"):
            self.timeline.to_csv(p, index=False)
        elif p.endswith(".json"):
            doc = {"figures": list(self.figures), "level": self.level,
                   "rows": [{k: (None if isinstance(v, float) and math.isnan(v) else v)
                             for k, v in r.items()} for r in self._rows]}
            with open(p, "w", encoding="utf-8") as fh:
                json.dump(doc, fh, indent=1)
        else:
            raise ValueError(f"path must end in .csv or .json, got {p!r}")

    @classmethod
    def load(cls, path: str | os.PathLike) -> Monitor:
        """A monitor holding the timeline saved at ``path`` (no probe batch: record nothing)."""
        import pandas as pd

        p = os.fspath(path)
        if p.endswith(".csv"):
            df = pd.read_csv(p)
            level = 0.9
        elif p.endswith(".json"):
            with open(p, encoding="utf-8") as fh:
                doc = json.load(fh)
            df = pd.DataFrame(doc.get("rows", []), columns=_COLUMNS)
            level = float(doc.get("level", 0.9))
        else:
            raise ValueError(f"path must end in .csv or .json, got {p!r}")
        missing = [c for c in _COLUMNS if c not in df.columns]
        if missing:
            raise ValueError(f"{p!r} is not a saved timeline: columns {missing} are missing")
        figures = tuple(dict.fromkeys(df["figure"].astype(str))) or DEFAULT_FIGURES
        m = cls(np.zeros((1, 2, 1)), [f for f in figures if f in MONITOR_FIGURES]
                or DEFAULT_FIGURES, level=level)
        df = df.astype({"step": int, "value": float, "low": float, "high": float})
        m._rows = [{"step": int(r.step), "figure": str(r.figure), "value": float(r.value),
                    "low": float(r.low), "high": float(r.high)} for r in df.itertuples()]
        return m

    # ------------------------------------------------------------------ drawing
    def plot(self, ax: Any = None, *, figures: Sequence[str] | None = None, **kw: Any):
        """Each figure against step with its interval band; one panel per figure.

        ``label=``, ``color=`` and ``bands=False`` are passed to the drawing.
        """
        return plot_timeline(self.timeline, ax=ax, figures=figures, **kw)

    def lightning_callback(self):
        """A PyTorch Lightning callback that calls :meth:`step` after every training batch."""
        return _lightning_callback(self)

    def __repr__(self) -> str:
        when = f"every={self.every}" if self.every is not None else f"budget={self.budget}"
        return (f"Monitor({len(self.figures)} figures, {when}, "
                f"{len({r['step'] for r in self._rows})} checks)")


def plot_timeline(table: Any, ax: Any = None, *, figures: Sequence[str] | None = None,
                  **kw: Any):
    """Draw a (step, figure, value, low, high) table: one panel per figure, against step.

    Keywords ``label``, ``color`` and ``bands`` as in the plotting layer's ``plot_timeline``.
    """
    from .._plotting.training import plot_timeline

    return plot_timeline(table, ax, figures=figures, **kw)


def _lightning_callback(monitor: Monitor):
    try:
        from lightning.pytorch import Callback
    except ImportError:
        try:
            from pytorch_lightning import Callback
        except ImportError as err:
            raise ImportError("the Lightning callback needs PyTorch Lightning; install it with "
                              "pip install 'hiddenlens[lightning]'") from err

    class _MonitorCallback(Callback):
        def on_train_batch_end(self, trainer, pl_module, outputs, batch, batch_idx):
            monitor.step(pl_module, int(trainer.global_step))

    return _MonitorCallback()

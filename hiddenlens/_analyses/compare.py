"""Compare training runs side by side: key figures, their differences, linear CKA of the states."""

from __future__ import annotations

from collections.abc import Callable, Iterable, Mapping, Sequence
from dataclasses import dataclass
from typing import TYPE_CHECKING, Any

import numpy as np

from .._core.record import as_system
from .._core.registry import analyses, analysis_spec
from .._core.results import frozen_mapping, readonly
from .._core.systems import RecurrentSystem
from .._core.trace import Trace
from .bootstrap import FigureIntervals, figure_intervals, within_noise
from .figures import figure_rows, key_figures, summary_sentence
from .runner import AnalysisResults, ModelLike, Sequences, run_analyses

if TYPE_CHECKING:  # the aliases of the public signatures
    from .._core.aliases import ArrayLike

__all__ = ["RunComparison", "compare_runs", "comparison_of", "figure_table", "linear_cka",
           "plot_overlay", "plot_cka", "check_intervals", "run_intervals"]


# ---------------------------------------------------------------------- linear CKA
def _as_matrix(a: Any, name: str) -> np.ndarray:
    if isinstance(a, Trace):
        a = a.states
    if hasattr(a, "detach"):
        a = a.detach().cpu().numpy()
    if not isinstance(a, np.ndarray):
        raise TypeError(f"{name} must be a numpy array, a tensor or a Trace, got "
                        f"{type(a).__name__}")
    if not np.issubdtype(a.dtype, np.floating):
        raise TypeError(f"{name} must hold floating-point numbers, got dtype {a.dtype}; "
                        f"convert it with {name}.astype(np.float64)")
    if a.ndim == 3:
        a = a.reshape(-1, a.shape[-1])  # (B, T, S) -> (B*T, S): one row per (sample, step)
    if a.ndim != 2 or a.shape[0] < 2 or a.shape[1] < 1:
        raise ValueError(f"{name} must have shape (n, p) with n >= 2 examples (or (B, T, S) "
                         f"states), got {a.shape}")
    if not np.isfinite(a).all():
        raise ValueError(f"{name} contains NaN or Inf; CKA needs finite features")
    return a.astype(np.float64)


def linear_cka(X: ArrayLike, Y: ArrayLike) -> float:
    """Linear centred kernel alignment between two representations of the same examples.

    Parameters
    ----------
    X : ndarray of shape (n, p1) or (B, T, p1)
        Features of n examples (rows); (B, T, S) states are flattened to (B*T, S).
    Y : ndarray of shape (n, p2) or (B, T, p2)
        Features of the same examples in the same order; p2 may differ from p1.

    Returns
    -------
    float
        CKA in [0, 1]: 1 for representations equal up to an orthogonal transform and an
        isotropic scaling, near 0 for unrelated ones.

    Notes
    -----
    With column-centred X and Y (done here),

        CKA(X, Y) = ||Yᵀ X||_F² / (||Xᵀ X||_F ||Yᵀ Y||_F),

    which equals HSIC(K, L) / sqrt(HSIC(K, K) HSIC(L, L)) for the linear Gram matrices
    K = X Xᵀ, L = Y Yᵀ (the 1/(n-1)² factors of HSIC cancel). It is invariant to orthogonal
    transforms and isotropic scaling of either side, not to arbitrary invertible linear maps.
    CKA compares the representations on these examples only.

    References
    ----------
    Kornblith, Norouzi, Lee & Hinton (2019), "Similarity of Neural Network Representations
    Revisited", ICML.
    """
    x = _as_matrix(X, "X")
    y = _as_matrix(Y, "Y")
    if x.shape[0] != y.shape[0]:
        raise ValueError(f"X and Y must describe the same examples: X has {x.shape[0]} rows, "
                         f"Y has {y.shape[0]}; record both runs on the same inputs")
    x = x - x.mean(axis=0)
    y = y - y.mean(axis=0)
    # whichever is smaller: feature space (p x p) or example space (n x n)
    if max(x.shape[1], y.shape[1]) <= x.shape[0]:
        cross = np.linalg.norm(y.T @ x) ** 2
        nx = np.linalg.norm(x.T @ x)
        ny = np.linalg.norm(y.T @ y)
    else:
        K, L = x @ x.T, y @ y.T  # (n, n)
        cross = float(np.sum(K * L))
        nx, ny = np.linalg.norm(K), np.linalg.norm(L)
    if nx == 0 or ny == 0:
        raise ValueError("one representation is constant over the examples (zero variance); "
                         "CKA is undefined for it")
    return float(cross / (nx * ny))


# ---------------------------------------------------------------------- result
@dataclass(frozen=True, eq=False)
class RunComparison:
    """Several runs analysed on the same inputs (from :func:`compare_runs`).

    Attributes
    ----------
    names : tuple of str
        Run names, in the order given; the first run is the reference for differences.
    table : pandas.DataFrame
        One row per run: model kind and state size, then each key figure (see
        :func:`hiddenlens.key_figures`, registered analyses included) followed by
        ``"Δ <figure>"``, its difference from the first run (numeric figures only).
    results : Mapping[str, AnalysisResults]
        Per run, analysis name -> result object (with ``.trace`` and ``.skipped``).
    cka : ndarray of shape (R, R)
        Linear CKA between the runs' hidden states on the same inputs (symmetric, ones on the
        diagonal).
    figures : Mapping[str, dict]
        Per run, the key figures as a dict.
    cka_parts : str
        Which states entered CKA: ``"output"`` (each run's top-layer h) or ``"all"``.
    intervals : Mapping[str, FigureIntervals] or None
        Per run, the intervals of its key figures (see :func:`hiddenlens.figure_intervals`);
        None when the comparison was made with ``intervals=False``. With intervals the
        table also holds ``"<figure> low"`` and ``"<figure> high"`` after each figure that has
        one, and ``"Δ <figure> within noise"`` after its difference: True when the paired
        bootstrap interval of the difference from the first run contains 0 (see
        :func:`hiddenlens.within_noise`), False when it does not, None where no interval could
        be formed (and for the first run).
    """

    names: tuple[str, ...]
    table: Any
    results: Mapping[str, AnalysisResults]
    cka: np.ndarray
    figures: Mapping[str, dict]
    cka_parts: str = "output"
    intervals: Mapping[str, FigureIntervals] | None = None

    def __post_init__(self) -> None:
        object.__setattr__(self, "names", tuple(self.names))
        if self.intervals is not None:
            object.__setattr__(self, "intervals", frozen_mapping(self.intervals))
        object.__setattr__(self, "cka", readonly(self.cka, dtype=np.float64))
        object.__setattr__(self, "results", frozen_mapping(self.results))
        object.__setattr__(self, "figures", frozen_mapping(self.figures))

    @property
    def traces(self) -> dict[str, Trace]:
        """Per run, the trace recorded on the shared inputs."""
        return {n: self.results[n].trace for n in self.names}

    def noise(self, figure: str, run: str) -> bool | None:
        """Whether ``run``'s difference from the first run in ``figure`` is within noise.

        None when the comparison has no intervals, for the first run, or where no interval
        of the difference could be formed.
        """
        if run not in self.names:
            raise KeyError(f"no run {run!r}; the runs are {', '.join(self.names)}")
        if self.intervals is None or run == self.names[0]:
            return None
        return within_noise(self.intervals[self.names[0]], self.intervals[run], figure)

    def summaries(self) -> dict[str, str]:
        """Per run, the key figures in plain words (see :func:`summary_sentence`)."""
        return {n: summary_sentence(self.figures[n]) for n in self.names}

    def to_frame(self):
        """The comparison table (a copy), one row per run."""
        return self.table.copy()

    def plot(self, analysis: str = "cka", ax: Any = None, **kw: Any):
        """Overlay one analysis for every run on one Axes, or draw the CKA matrix.

        Parameters
        ----------
        analysis : str, default "cka"
            ``"cka"`` or a name from :func:`hiddenlens.analyses`, drawn by the analysis'
            overlay: PCA as cumulative explained variance (the axes of different runs are
            not comparable), fixed points as counts per stability class.
        ax : matplotlib Axes, optional

        Returns
        -------
        matplotlib Axes
        """
        if analysis == "cka":
            return plot_cka(self.cka, self.names, ax=ax, **kw)
        if analysis not in analyses():
            raise ValueError(f"unknown analysis {analysis!r}; expected 'cka' or one of "
                             f"{', '.join(analyses())}")
        present = {n: self.results[n][analysis] for n in self.names
                   if analysis in self.results[n]}
        if not present:
            raise ValueError(f"no run has a {analysis!r} result; run compare_runs with "
                             f"which=[..., {analysis!r}]")
        return plot_overlay(analysis, present, ax=ax, **kw)

    def __repr__(self) -> str:
        return f"RunComparison(runs=[{', '.join(self.names)}])"


# ---------------------------------------------------------------------- comparing
def compare_runs(
    runs: Mapping[str, ModelLike],
    inputs: Sequences,
    *,
    which: Iterable[str] | None = None,
    options: Mapping[str, Mapping[str, Any]] | None = None,
    progress: bool | Callable[[str, int, int], Any] | None = None,
    seed: int = 0,
    cka_parts: str = "output",
    on_error: str = "raise",
    context: Mapping[str, Any] | None = None,
    intervals: bool | Mapping[str, Any] = True,
) -> RunComparison:
    """Analyse several runs on the same inputs and put their key figures side by side.

    Parameters
    ----------
    runs : Mapping[str, model or system]
        Run name -> anything :func:`hiddenlens.wrap` accepts (or a system). Architectures and
        state sizes may differ; the input size must be the same.
    inputs : Tensor or ndarray of shape (B, T, I)
        The same sequences for every run.
    which, options, seed, on_error, context
        As in :func:`hiddenlens.run_analyses`, applied to every run.
    progress : bool or callable, optional
        ``True`` shows one bar over all runs and analyses; a callable is called as
        ``progress("<run>: <analysis>", done, total)``.
    cka_parts : {"output", "all"}, default "output"
        States entering CKA: each run's top-layer hidden state, or its whole flat state
        (including LSTM cell states).
    intervals : bool or Mapping, default True
        Put intervals on the key figures and mark each difference from the first run as
        within noise or not (see :class:`RunComparison`). True: bootstrap over the B input
        sequences at level 0.9 with 200 resamples, from the recordings already made (array
        arithmetic, no analysis is rerun); the figures of the memory and fixed-point analyses,
        which draw their own inputs, get no interval. A mapping sets ``level``, ``n_boot``
        and ``n_draws`` (reruns of those two analyses with other seeds, which costs about
        ``n_draws`` times their time), e.g. ``{"level": 0.95, "n_draws": 4}``. False: no
        intervals.

    Returns
    -------
    RunComparison
        ``.table``, ``.results``, ``.cka``, ``.intervals``, ``.plot(analysis)``,
        ``.to_frame()``.

    Notes
    -----
    Intervals say how much a figure moves with another batch of sequences from the same
    distribution as ``inputs``; they do not cover other inputs. With fewer than about 10
    sequences they are too narrow.

    CKA compares the runs' representations on these inputs only; other inputs can rank the
    runs differently.
    """
    if cka_parts not in ("output", "all"):
        raise ValueError(f"cka_parts must be 'output' or 'all', got {cka_parts!r}")
    interval_options = check_intervals(intervals)
    systems = check_runs(runs)
    names = list(systems)
    which_list = None if which is None else ([which] if isinstance(which, str) else list(which))
    ticks = _Ticks(progress, len(names))
    bar = ticks.bar
    results: dict[str, AnalysisResults] = {}
    try:
        for n in names:
            results[n] = run_analyses(systems[n], inputs, which=which_list, options=options,
                                      progress=ticks.for_run(n), seed=seed, on_error=on_error,
                                      context=context)
        if callable(progress):
            progress("done", ticks.done, ticks.done)
    finally:
        if bar is not None:
            bar.close()
    return comparison_of(results, systems, cka_parts=cka_parts, intervals=interval_options,
                         seed=seed, options=options)


def check_intervals(intervals: Any) -> dict[str, Any] | None:
    """The ``intervals=`` option as keyword arguments of the intervals (None: no intervals)."""
    if intervals is False or intervals is None:
        return None
    if intervals is True:
        return {}
    if not isinstance(intervals, Mapping):
        raise TypeError(f"intervals must be True, False or a mapping of level, n_boot, "
                        f"n_draws (e.g. {{'level': 0.95}}), got {type(intervals).__name__}")
    unknown = set(intervals) - {"level", "n_boot", "n_draws"}
    if unknown:
        raise ValueError(f"intervals has unknown keys {sorted(unknown)}; expected level, "
                         "n_boot, n_draws")
    return dict(intervals)


def run_intervals(results: Mapping[str, AnalysisResults],
                  systems: Mapping[str, RecurrentSystem], *, seed: int = 0,
                  options: Mapping[str, Mapping[str, Any]] | None = None, level: float = 0.9,
                  n_boot: int = 200, n_draws: int = 0) -> dict[str, FigureIntervals]:
    """Per run, the intervals of its key figures, resampled with the same indices (paired)."""
    from .bootstrap import bootstrap_figures

    out = {}
    for n, res in results.items():
        if n_draws:
            x = np.array(res.trace.inputs)  # a writable copy: the trace's array is read-only
            out[n] = bootstrap_figures(systems[n], x, options=options,
                                       level=level, n_boot=n_boot, n_draws=n_draws, seed=seed,
                                       results=res)
        else:
            out[n] = figure_intervals(res, level=level, n_boot=n_boot, seed=seed)
    return out


def check_runs(runs: Mapping[str, ModelLike], **wrap_options: Any
               ) -> dict[str, RecurrentSystem]:
    """Run name -> system for a mapping of runs that read the same inputs (checked)."""
    if not isinstance(runs, Mapping) or len(runs) == 0:
        raise TypeError("runs must be a non-empty mapping name -> model, e.g. "
                        "{'before': model_a, 'after': model_b}")
    names = [str(n) for n in runs]
    if len(set(names)) != len(names):
        raise ValueError("run names must be distinct as strings")
    systems = {str(n): as_system(m, **wrap_options) for n, m in runs.items()}
    sizes = {n: s.input_size for n, s in systems.items()}
    if len(set(sizes.values())) > 1:
        raise ValueError(f"runs take different input sizes {sizes}; compare runs that read the "
                         "same inputs")
    return systems


class _Ticks:
    """One progress count over every run's analyses: a bar, or ``progress(label, done, total)``."""

    def __init__(self, progress: Any, n_runs: int) -> None:
        self.progress, self.n_runs, self.done = progress, n_runs, 0
        self.bar = None
        if progress is True:
            from tqdm.auto import tqdm

            self.bar = tqdm(total=None, desc="compare", leave=False)

    def for_run(self, run: str) -> Callable[[str, int, int], None] | None:
        if not self.progress:
            return None

        def step(name: str, _i: int, total: int) -> None:
            if name == "done":
                return
            grand = total * self.n_runs
            if self.bar is not None:
                self.bar.total, self.bar.n = grand, self.done
                self.bar.set_postfix_str(f"{run}: {name}")
            else:
                self.progress(f"{run}: {name}", self.done, grand)
            self.done += 1

        return step


def comparison_of(results: Mapping[str, AnalysisResults],
                  systems: Mapping[str, RecurrentSystem], *,
                  cka_parts: str = "output", intervals: bool | Mapping[str, Any] = True,
                  seed: int = 0, options: Mapping[str, Mapping[str, Any]] | None = None
                  ) -> RunComparison:
    """The comparison of runs already analysed: key-figure table, Δ columns and CKA.

    Parameters
    ----------
    results : Mapping[str, AnalysisResults]
        Run name -> its results (with ``.trace``), in order; the first run is the reference.
    systems : Mapping[str, RecurrentSystem]
        Run name -> the system the results came from.
    cka_parts : {"output", "all"}, default "output"
        As in :func:`compare_runs`.
    intervals : bool or Mapping, default True
        As in :func:`compare_runs`.
    seed : int, default 0
        Seed of the resampling (and of the reruns when ``n_draws`` is given).
    options : Mapping, optional
        Analysis options of the reruns when ``n_draws`` is given.
    """
    interval_options = check_intervals(intervals)
    names = [str(n) for n in results]
    cka = np.eye(len(names))
    states = {}
    for n in names:
        tr = results[n].trace
        cols = tr.columns(systems[n].output_part) if cka_parts == "output" else tr.columns()
        states[n] = tr.states[:, :, cols]  # (B, T, S_n)
    for i, a in enumerate(names):
        for j in range(i + 1, len(names)):
            b = names[j]
            try:
                v = linear_cka(states[a], states[b])
            except ValueError:  # a constant representation, or non-finite states
                v = float("nan")
            cka[i, j] = cka[j, i] = v

    figures = {n: key_figures(results[n]) for n in names}
    fis = None
    if interval_options is not None:
        fis = run_intervals({n: results[n] for n in names}, systems, seed=seed,
                            options=options, **interval_options)
    table = figure_table(names, systems, figures, intervals=fis)
    return RunComparison(names=tuple(names), table=table, results=dict(results), cka=cka,
                         figures=figures, cka_parts=cka_parts, intervals=fis)


def figure_table(names: Sequence[str], systems: Mapping[str, RecurrentSystem],
                 figures: Mapping[str, Mapping[str, Any]],
                 intervals: Mapping[str, FigureIntervals] | None = None):
    """One row per run: kind, state size, then each figure and its ``"Δ <figure>"``.

    With ``intervals`` (run name -> FigureIntervals), a figure with an interval in some run is
    followed by ``"<figure> low"`` and ``"<figure> high"``, and its difference by
    ``"Δ <figure> within noise"`` (True, False or None).
    """
    import pandas as pd

    rows: dict[str, dict[str, Any]] = {
        n: {"kind": systems[n].kind, "state_size": systems[n].state_size} for n in names}
    counts = []
    for fr in figure_rows({n: figures[n] for n in names}):
        for n in names:
            rows[n][fr.key] = fr.values[n]
            bounded = intervals is not None and fr.numeric and any(
                _has_interval(intervals[m], fr.key) for m in names)
            if bounded:
                fi = intervals[n]
                lo, hi = (fi[fr.key][1:] if fr.key in fi else (np.nan, np.nan))
                rows[n][f"{fr.key} low"], rows[n][f"{fr.key} high"] = lo, hi
            if fr.numeric:
                d = fr.deltas[n] if n != names[0] else (0 if fr.values[n] is not None else None)
                rows[n][f"\u0394 {fr.key}"] = np.nan if d is None else d
            if bounded:
                rows[n][f"\u0394 {fr.key} within noise"] = None if n == names[0] else \
                    within_noise(intervals[names[0]], intervals[n], fr.key)
        if fr.numeric and all(_is_int(v) for v in fr.values.values()):
            counts.append(fr.key)
    table = pd.DataFrame([rows[n] for n in names], index=pd.Index(names, name="run"))
    for k in counts:  # counts stay integers when every run has one
        table[k] = table[k].astype(int)
        table[f"\u0394 {k}"] = table[f"\u0394 {k}"].astype(int)
    return table


def _has_interval(fi: FigureIntervals, figure: str) -> bool:
    return figure in fi and bool(np.isfinite(fi[figure][1]))


def _is_int(v: Any) -> bool:
    return isinstance(v, (int, np.integer)) and not isinstance(v, bool)


# ---------------------------------------------------------------------- overlay plots
def plot_overlay(analysis: str, results: Mapping[str, Any], ax: Any = None, *,
                 colors: Sequence[str] | None = None):
    """Draw one analysis of several runs on one Axes; ``results`` maps run name -> result.

    The analysis' ``overlay`` draws; one without an overlay draws each run's ``.plot`` on the
    same Axes. Runs are told apart by colour (the colour-blind-safe Okabe-Ito palette, see
    :func:`hiddenlens._plotting.style.run_style`) and by line style, marker and bar hatch, so they
    stay apart in grey print and under colour-vision deficiencies. ``colors`` gives one colour
    per run instead of the palette.
    """
    from .._plotting.compare import draw_overlay

    spec = analysis_spec(analysis)
    return draw_overlay(results, ax, overlay=spec.overlay, title=spec.title, colors=colors)


def plot_cka(cka: Any, names: Iterable[str], ax: Any = None, **kw: Any):
    """Draw a runs x runs CKA matrix with its values written in the cells."""
    from .._plotting.compare import plot_cka

    return plot_cka(cka, names, ax, **kw)

"""Uncertainty on key figures: bootstrap over the recorded sequences, and spread over input draws.

One recording is reused: the per-sequence parts of each result (exponents per sample, log norms
per sample, singular values per sample and step, per-sequence state moments) are resampled by
index, so an interval costs array arithmetic, not new analyses. Figures of analyses that draw
their own inputs or starting states (memory, fixed points) get their spread from reruns with
other seeds instead.
"""

from __future__ import annotations

import math
import numbers
import warnings
from collections.abc import Iterable, Mapping, Sequence
from dataclasses import dataclass
from typing import TYPE_CHECKING, Any

import numpy as np

from .._core.results import frozen_mapping, readonly

if TYPE_CHECKING:  # the aliases of the public signatures
    from .._core.aliases import ModelLike, Sequences

__all__ = [
    "FigureIntervals",
    "figure_intervals",
    "bootstrap_figures",
    "within_noise",
    "compare_intervals",
    "SEQUENCE_FIGURES",
    "DRAW_FIGURES",
]

#: Figures whose interval comes from resampling the trace's sequences.
SEQUENCE_FIGURES: tuple[str, ...] = (
    "lyapunov_max", "kaplan_yorke_dimension", "gradient_rate", "gradient_half_life",
    "participation_ratio", "top_singular_value_median", "spectral_radius_median",
)
#: Figures whose interval comes from reruns with other seeds (the analysis draws its own inputs).
DRAW_FIGURES: tuple[str, ...] = (
    "memory_span", "memory_capacity", "fixed_points_stable", "fixed_points_saddle",
    "fixed_points_unstable", "fixed_points_marginal",
)
_DRAW_ANALYSES = ("memory", "fixed_points")
_CHUNK = 2**24  # floats per block of resampled arrays


@dataclass(frozen=True, eq=False)
class FigureIntervals:
    """Key figures with percentile intervals at a stated level.

    Attributes
    ----------
    figures : tuple of str
        F figure names, keyed as in ``hiddenlens._faces.summary.FIGURES``.
    values : ndarray of shape (F,)
        The point estimate of each figure on all the data (as ``key_figures`` gives it).
    low, high : ndarray of shape (F,)
        Bounds of the central (expanded, see :func:`figure_intervals`) percentile interval;
        NaN where no interval could be made (one sequence, no draws, non-finite replicates).
    methods : tuple of str
        Per figure: ``"sequences"`` (bootstrap over the B recorded sequences), ``"draws"``
        (spread over reruns with other seeds) or ``"none"``.
    level : float
        Nominal coverage of the intervals, e.g. 0.9.
    n_boot : int
        Bootstrap resamples per figure.
    n_sequences : int
        B, the number of sequences resampled.
    replicates : Mapping[str, ndarray]
        Per figure, the bootstrap (n_boot,) or draw values; used by :func:`within_noise`.
    seed : int
        Seed of the resampling indices.

    Notes
    -----
    A percentile bootstrap treats the B sequences as independent draws from the input
    distribution: the interval says how much a figure would move with another batch from the
    *same* distribution, not under other inputs. With few sequences (B < 10) it is too narrow.
    """

    figures: tuple[str, ...]
    values: np.ndarray
    low: np.ndarray
    high: np.ndarray
    methods: tuple[str, ...]
    level: float
    n_boot: int
    n_sequences: int
    replicates: Mapping[str, np.ndarray]
    seed: int

    def __post_init__(self) -> None:
        for name in ("values", "low", "high"):
            object.__setattr__(self, name, readonly(getattr(self, name), np.float64))
        object.__setattr__(self, "replicates", frozen_mapping(
            {k: readonly(v, np.float64) for k, v in self.replicates.items()}))

    def __getitem__(self, figure: str) -> tuple[float, float, float]:
        """``(value, low, high)`` of one figure."""
        i = self._index(figure)
        return float(self.values[i]), float(self.low[i]), float(self.high[i])

    def __contains__(self, figure: object) -> bool:
        return figure in self.figures

    def _index(self, figure: str) -> int:
        try:
            return self.figures.index(figure)
        except ValueError:
            raise KeyError(f"no interval for figure {figure!r}; this result has "
                           f"{', '.join(self.figures) or 'none'}") from None

    @property
    def table(self):
        """pandas DataFrame: one row per figure (figure, value, low, high, level, method)."""
        import pandas as pd

        return pd.DataFrame({
            "figure": list(self.figures), "value": self.values.copy(), "low": self.low.copy(),
            "high": self.high.copy(), "level": self.level, "method": list(self.methods),
        })

    def to_frame(self):
        """The same as :attr:`table`."""
        return self.table

    def plot(self, ax: Any = None, **kw: Any):
        """Each figure with its interval as an error bar (one row per figure)."""
        from .._plotting.bootstrap import draw_intervals

        return draw_intervals(self, ax, **kw)

    def __repr__(self) -> str:
        return (f"FigureIntervals({len(self.figures)} figures, level={self.level}, "
                f"n_boot={self.n_boot}, B={self.n_sequences})")


# ---------------------------------------------------------------------- checks
def _check_level(level: Any) -> float:
    if isinstance(level, bool) or not isinstance(level, numbers.Real) or not 0 < level < 1:
        raise ValueError(f"level must be a number strictly between 0 and 1 (the nominal "
                         f"coverage, e.g. 0.9), got {level!r}")
    return float(level)


def _check_count(value: Any, name: str, low: int, example: int) -> int:
    if isinstance(value, bool) or not isinstance(value, (int, np.integer)) or value < low:
        raise ValueError(f"{name} must be an integer >= {low}, got {value!r}; e.g. "
                         f"{name}={example}")
    return int(value)


def _tail(level: float, n: int | None) -> float:
    """Lower tail probability of the interval, in percent.

    ``n`` given: Hesterberg's expanded percentile interval, tail Phi(sqrt(n/(n-1)) t_{a,n-1}),
    which corrects the plain percentile interval's undercoverage for few sequences
    (Hesterberg 2015, "What teachers should know about the bootstrap", The American
    Statistician 69(4)).
    """
    a = (1.0 - level) / 2.0
    if n is None or n < 2:
        return 100.0 * a
    from scipy import stats

    return 100.0 * float(stats.norm.cdf(math.sqrt(n / (n - 1.0)) * stats.t.ppf(a, n - 1)))


def _percentile(reps: np.ndarray, level: float, n: int | None = None) -> tuple[float, float]:
    r = np.asarray(reps, dtype=float)
    r = r[np.isfinite(r)]
    if r.size < 2 or r.size < 0.9 * np.asarray(reps).size:
        return math.nan, math.nan  # too many replicates overflowed: no honest interval
    a = _tail(level, n)
    lo, hi = np.percentile(r, [a, 100.0 - a])
    return float(lo), float(hi)


def _nanmedian_rows(a: np.ndarray) -> np.ndarray:
    with warnings.catch_warnings():
        warnings.simplefilter("ignore", RuntimeWarning)
        return np.nanmedian(a, axis=1)


# ---------------------------------------------------------------------- resampling
def _row_indices(rng: np.random.Generator, n_boot: int, rows: np.ndarray) -> np.ndarray:
    return rows[rng.integers(0, rows.size, size=(n_boot, rows.size))]  # (R, B)


def _sequence_replicates(results: Mapping[str, Any], idx: np.ndarray,
                         samples: np.ndarray) -> dict[str, np.ndarray]:
    """Bootstrap values of the sequence figures for resampled trace rows ``idx`` (R, B)."""
    out: dict[str, np.ndarray] = {}
    R = idx.shape[0]
    r = results.get("lyapunov")
    if r is not None and np.asarray(r.per_sample).size:
        from .lyapunov import kaplan_yorke_dimension

        per = np.asarray(r.per_sample, dtype=float)  # (B, k)
        reps = per[idx].mean(axis=1)  # (R, k)
        out["lyapunov_max"] = reps[:, 0]
        S = int(r.state_size)
        out["kaplan_yorke_dimension"] = np.array(
            [kaplan_yorke_dimension(row, S) if np.all(np.isfinite(row)) else math.nan
             for row in reps])
    r = results.get("gradient_flow")
    if r is not None:
        out.update(_gradient_replicates(r, idx, samples))
    r = results.get("spectra")
    if r is not None:
        sv = np.asarray(r.singular_values, dtype=float)
        if sv.size:
            out["top_singular_value_median"] = _median_replicates(sv[..., 0], idx)
        rho = getattr(r, "spectral_radius", None)
        if rho is not None:
            out["spectral_radius_median"] = _median_replicates(np.asarray(rho, float), idx)
    r = results.get("pca")
    trace = getattr(results, "trace", None)
    if r is not None and trace is not None:
        out["participation_ratio"] = _pr_replicates(trace, r, idx)
    return {k: v for k, v in out.items() if v.shape == (R,)}


def _median_replicates(a: np.ndarray, idx: np.ndarray) -> np.ndarray:
    """Median over resampled sequences and all steps of ``a`` (B, T) per resample."""
    R, B = idx.shape
    T = a.shape[1]
    per = max(1, _CHUNK // max(B * T, 1))
    out = np.empty(R)
    for s in range(0, R, per):
        block = a[idx[s:s + per]].reshape(-1, B * T)  # (r, B*T)
        out[s:s + per] = _nanmedian_rows(block)
    return out


def _gradient_replicates(r: Any, idx: np.ndarray, samples: np.ndarray) -> dict[str, np.ndarray]:
    from .gradient_flow import _fit_rate, _half_life

    log_n = np.asarray(r.log_norms, dtype=float)  # (Bg, L)
    lags = np.asarray(r.lags, dtype=float)
    rows = np.asarray(r.samples, dtype=int)
    # map trace rows to gradient-flow rows; resampled rows it did not analyse are dropped
    where = {int(s): i for i, s in enumerate(rows)}
    if not set(where) >= set(samples.tolist()):
        return {}
    local = np.vectorize(where.__getitem__, otypes=[int])(idx)  # (R, B)
    block = log_n[local]  # (R, B, L)
    known = ~np.isnan(block)
    with np.errstate(invalid="ignore", divide="ignore"):
        pooled = np.where(known, block, 0.0).sum(axis=1) / known.sum(axis=1)  # (R, L)
    rate = np.array([_fit_rate(lags, row)[0] for row in pooled])
    return {"gradient_rate": rate,
            "gradient_half_life": np.array([_half_life(v) for v in rate])}


def _pr_replicates(trace: Any, r: Any, idx: np.ndarray) -> np.ndarray:
    """Participation ratio of the pooled covariance of resampled sequences, from moments."""
    cols = np.asarray(r.columns, dtype=int)
    X = np.asarray(trace.states[:, :, cols], dtype=np.float64)  # (B, T, D)
    B, T, D = X.shape
    s1 = X.sum(axis=1)  # (B, D)
    s2 = np.einsum("btd,bte->bde", X, X)  # (B, D, D)
    R = idx.shape[0]
    counts = np.zeros((R, B))
    np.add.at(counts, (np.repeat(np.arange(R), idx.shape[1]), idx.ravel()), 1.0)  # (R, B)
    out = np.empty(R)
    per = max(1, _CHUNK // max(D * D, 1))
    n = counts.sum(axis=1) * T  # (R,)
    for s in range(0, R, per):
        c = counts[s:s + per]
        m = (c @ s1) / n[s:s + per, None]  # (r, D)
        cov = np.einsum("rb,bde->rde", c, s2) / n[s:s + per, None, None] \
            - m[:, :, None] * m[:, None, :]  # (r, D, D)
        ev = np.clip(np.linalg.eigvalsh(cov), 0.0, None)  # (r, D)
        tot = ev.sum(axis=1)
        with np.errstate(invalid="ignore", divide="ignore"):
            out[s:s + per] = tot**2 / (ev**2).sum(axis=1)
    return out


# ---------------------------------------------------------------------- public functions
def figure_intervals(
    results: Mapping[str, Any],
    *,
    level: float = 0.9,
    n_boot: int = 200,
    seed: int = 0,
    samples: Sequence[int] | None = None,
    draws: Iterable[Mapping[str, Any]] | None = None,
) -> FigureIntervals:
    """Percentile intervals of the key figures of results already computed.

    Parameters
    ----------
    results : Mapping[str, result]
        Analysis name -> result, e.g. from ``hiddenlens._faces.summary.run_analyses`` (its
        ``.trace`` is needed for the participation ratio).
    level : float, default 0.9
        Nominal coverage of the central percentile intervals.
    n_boot : int, default 200
        Bootstrap resamples of the sequences.
    seed : int, default 0
        Seed of the resampling indices (a local ``np.random.default_rng``). Two results of the
        same inputs and seed are resampled with the same indices, i.e. paired, which is what
        :func:`within_noise` needs to compare two runs on one batch.
    samples : sequence of int, optional
        Trace rows to use as the population (default: all B); the point values are then the
        figures of these rows alone, recomputed from the per-sequence parts.
    draws : iterable of Mapping, optional
        Results of the same model from reruns with other seeds (see
        :func:`bootstrap_figures`); they give the intervals of the figures in
        :data:`DRAW_FIGURES`.

    Returns
    -------
    FigureIntervals

    Notes
    -----
    Sequence figures: the figure is recomputed from B rows drawn with replacement, ``n_boot``
    times, and the interval is the expanded percentile interval of these replicates (tails
    ``Phi(sqrt(B/(B-1)) t_{(1-level)/2, B-1})`` instead of ``(1-level)/2``; Hesterberg 2015),
    which keeps coverage near ``level`` down to B of about 10. Draw figures: plain percentiles
    of the point value and the reruns' values (few values: a rough range, not a calibrated
    interval).

    References
    ----------
    Efron & Tibshirani (1993), An Introduction to the Bootstrap, Chapman & Hall, ch. 13.
    Hesterberg (2015), The American Statistician 69(4), 371-386.
    """
    from .figures import key_figures

    level = _check_level(level)
    n_boot = _check_count(n_boot, "n_boot", 2, 200)
    seed = _check_count(seed, "seed", 0, 0)
    if not isinstance(results, Mapping):
        raise TypeError(f"results must be a mapping analysis name -> result (e.g. from "
                        f"run_analyses), got {type(results).__name__}")
    B = _batch_size(results)
    rows = np.arange(B) if samples is None else _check_rows(samples, B)
    rng = np.random.default_rng(seed)
    values = dict(key_figures(results))
    reps: dict[str, np.ndarray] = {}
    methods: dict[str, str] = {}
    if B:
        reps = _sequence_replicates(results, _row_indices(rng, n_boot, rows), rows)
        if samples is not None:
            point = _sequence_replicates(results, rows[None, :], rows)
            values.update({k: float(v[0]) for k, v in point.items()})
        methods.update({k: "sequences" for k in reps})
    draw_reps = _draw_replicates(values, draws)
    reps.update(draw_reps)
    methods.update({k: "draws" for k in draw_reps})
    names = tuple(k for k, v in values.items()
                  if isinstance(v, (int, float, np.number)) and not isinstance(v, bool))
    lows, highs = [], []
    for k in names:
        if methods.get(k) == "draws":
            lo, hi = _percentile(reps[k], level)
        elif k in reps and rows.size > 1:
            lo, hi = _percentile(reps[k], level, int(rows.size))
        else:
            lo, hi = math.nan, math.nan
        lows.append(lo)
        highs.append(hi)
    return FigureIntervals(
        figures=names, values=np.array([float(values[k]) for k in names]),
        low=np.array(lows), high=np.array(highs),
        methods=tuple(methods.get(k, "none") for k in names), level=level, n_boot=n_boot,
        n_sequences=int(rows.size), replicates={k: reps[k] for k in names if k in reps},
        seed=seed,
    )


def _check_rows(samples: Any, B: int) -> np.ndarray:
    rows = np.asarray(samples)
    if rows.ndim != 1 or rows.size == 0 or not np.issubdtype(rows.dtype, np.integer) \
            or rows.min() < 0 or rows.max() >= B:
        raise ValueError(f"samples must be a non-empty 1-D sequence of row indices in "
                         f"[0, {B}), got {samples!r}")
    return rows


def _draw_replicates(values: Mapping[str, Any], draws: Iterable[Mapping[str, Any]] | None
                     ) -> dict[str, np.ndarray]:
    """Figure -> the point value and the reruns' values, for the draw figures all of them have."""
    from .figures import key_figures

    per_draw = [key_figures(d) for d in draws or ()]
    if not per_draw:
        return {}
    return {k: np.array([float(values[k])] + [float(d[k]) for d in per_draw])
            for k in DRAW_FIGURES if k in values and all(k in d for d in per_draw)}


def _batch_size(results: Mapping[str, Any]) -> int:
    trace = getattr(results, "trace", None)
    if trace is not None:
        return int(trace.batch_size)
    for name in ("lyapunov", "spectra"):
        r = results.get(name)
        if r is not None:
            return int(np.asarray(r.per_sample if name == "lyapunov"
                                  else r.singular_values).shape[0])
    return 0


def bootstrap_figures(
    model_or_system: ModelLike,
    inputs: Sequences,
    *,
    which: Iterable[str] | None = None,
    options: Mapping[str, Mapping[str, Any]] | None = None,
    level: float = 0.9,
    n_boot: int = 200,
    n_draws: int = 4,
    seed: int = 0,
    results: Mapping[str, Any] | None = None,
) -> FigureIntervals:
    """Run the analyses once and put intervals on their key figures.

    Parameters
    ----------
    model_or_system : RecurrentSystem, nn.Module or callable
        Anything ``hiddenlens.wrap`` accepts.
    inputs : Tensor or ndarray of shape (B, T, I)
        The sequences; their B rows are what the bootstrap resamples.
    which, options
        As in ``run_analyses``.
    level, n_boot
        As in :func:`figure_intervals`.
    n_draws : int, default 4
        Reruns of the analyses that draw their own inputs or starts (memory, fixed points)
        with seeds ``seed + 1 ... seed + n_draws``; 0 leaves their figures without interval.
    seed : int, default 0
        Seed of the analyses and of the resampling.
    results : Mapping, optional
        Results already computed from this model on ``inputs`` with ``seed`` (skips the first
        run).

    Returns
    -------
    FigureIntervals
    """
    from .runner import run_analyses

    n_draws = _check_count(n_draws, "n_draws", 0, 4)
    if results is not None and not isinstance(results, Mapping):
        raise TypeError(f"results must be the mapping run_analyses returned (analysis name -> "
                        f"result), got {type(results).__name__}")
    if results is None:
        results = run_analyses(model_or_system, inputs, which=which, options=options,
                               seed=seed)
    again = [a for a in _DRAW_ANALYSES if a in results]
    draws = []
    if again and n_draws:
        opts = {a: v for a, v in (options or {}).items() if a in again}
        for d in range(1, n_draws + 1):
            draws.append(run_analyses(model_or_system, inputs, which=again, options=opts,
                                      seed=seed + d, trace=getattr(results, "trace", None)))
    return figure_intervals(results, level=level, n_boot=n_boot, seed=seed, draws=draws)


def within_noise(a: FigureIntervals, b: FigureIntervals, figure: str, *,
                 method: str = "difference") -> bool | None:
    """Whether the change of ``figure`` from run ``a`` to run ``b`` is within noise.

    Parameters
    ----------
    a, b : FigureIntervals
    figure : str
    method : {"difference", "overlap"}
        ``"difference"``: the percentile interval (at ``a.level``) of the bootstrap
        differences ``b - a`` contains 0; with the same seed and B both runs were resampled
        with the same indices, which pairs them when they saw the same inputs. Falls back to
        ``"overlap"`` for figures from draws. ``"overlap"``: the two intervals overlap (more
        lenient).

    Returns
    -------
    bool or None
        None when no interval can be formed (missing figure, too few replicates, overflow).
    """
    if method not in ("difference", "overlap"):
        raise ValueError(f"method must be 'difference' or 'overlap', got {method!r}")
    for name, r in (("a", a), ("b", b)):
        if not isinstance(r, FigureIntervals):
            raise TypeError(f"{name} must be a FigureIntervals (from figure_intervals or "
                            f"bootstrap_figures), got {type(r).__name__}")
    if figure not in a or figure not in b:
        from .figures import figure_labels

        known = set(figure_labels()) | set(a.figures) | set(b.figures)
        if figure not in known:
            raise ValueError(f"no figure named {figure!r}; these intervals hold "
                             f"{', '.join(dict.fromkeys(a.figures + b.figures)) or 'none'}")
        return None
    ra, rb = a.replicates.get(figure), b.replicates.get(figure)
    paired = (ra is not None and rb is not None and ra.shape == rb.shape
              and a.methods[a._index(figure)] == "sequences"
              and b.methods[b._index(figure)] == "sequences")
    if method == "difference" and paired:
        lo, hi = _percentile(rb - ra, a.level, a.n_sequences)
        if math.isnan(lo):
            return None
        return bool(lo <= 0.0 <= hi)
    _, alo, ahi = a[figure]
    _, blo, bhi = b[figure]
    if any(math.isnan(v) for v in (alo, ahi, blo, bhi)):
        return None
    return bool(alo <= bhi and blo <= ahi)


def compare_intervals(a: FigureIntervals, b: FigureIntervals, *,
                      method: str = "difference"):
    """Figures common to two runs side by side, with the change and whether it is noise.

    Returns
    -------
    pandas.DataFrame
        Columns figure, a, a_low, a_high, b, b_low, b_high, difference (b - a),
        within_noise (bool or None).
    """
    import pandas as pd

    rows = []
    for f in a.figures:
        if f not in b:
            continue
        va, la, ha = a[f]
        vb, lb, hb = b[f]
        rows.append({"figure": f, "a": va, "a_low": la, "a_high": ha, "b": vb, "b_low": lb,
                     "b_high": hb, "difference": vb - va,
                     "within_noise": within_noise(a, b, f, method=method)})
    return pd.DataFrame(rows, columns=["figure", "a", "a_low", "a_high", "b", "b_low",
                                       "b_high", "difference", "within_noise"])

"""Compare training runs side by side: key figures, their differences, linear CKA of the states."""

from __future__ import annotations

from collections.abc import Callable, Iterable, Mapping
from dataclasses import dataclass
from typing import Any

import numpy as np

from ._record import as_system
from ._results import frozen_mapping, readonly
from ._summary import (
    ANALYSES,
    FIGURES,
    TITLES,
    AnalysisResults,
    _nanmedian,
    key_figures,
    run_analyses,
    summary_sentence,
)
from ._trace import Trace

__all__ = ["RunComparison", "compare_runs", "linear_cka"]


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


def linear_cka(X: Any, Y: Any) -> float:
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
        :data:`hiddenlens._summary.FIGURES`) followed by ``"Δ <figure>"``, its difference
        from the first run (numeric figures only).
    results : Mapping[str, AnalysisResults]
        Per run, analysis name -> result object (with ``.trace`` and ``.skipped``).
    cka : ndarray of shape (R, R)
        Linear CKA between the runs' hidden states on the same inputs (symmetric, ones on the
        diagonal).
    figures : Mapping[str, dict]
        Per run, the key figures as a dict.
    cka_parts : str
        Which states entered CKA: ``"output"`` (each run's top-layer h) or ``"all"``.
    """

    names: tuple[str, ...]
    table: Any
    results: Mapping[str, AnalysisResults]
    cka: np.ndarray
    figures: Mapping[str, dict]
    cka_parts: str = "output"

    def __post_init__(self) -> None:
        object.__setattr__(self, "names", tuple(self.names))
        object.__setattr__(self, "cka", readonly(self.cka, dtype=np.float64))
        object.__setattr__(self, "results", frozen_mapping(self.results))
        object.__setattr__(self, "figures", frozen_mapping(self.figures))

    @property
    def traces(self) -> dict[str, Trace]:
        """Per run, the trace recorded on the shared inputs."""
        return {n: self.results[n].trace for n in self.names}

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
            ``"cka"`` or a name from :data:`hiddenlens._summary.ANALYSES`. PCA is overlaid as
            cumulative explained variance (the axes of different runs are not comparable),
            fixed points as counts per stability class.
        ax : matplotlib Axes, optional

        Returns
        -------
        matplotlib Axes
        """
        if analysis == "cka":
            return plot_cka(self.cka, self.names, ax=ax, **kw)
        if analysis not in ANALYSES:
            raise ValueError(f"unknown analysis {analysis!r}; expected 'cka' or one of "
                             f"{', '.join(ANALYSES)}")
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
    runs: Mapping[str, Any],
    inputs: Any,
    *,
    which: Iterable[str] | None = None,
    options: Mapping[str, Mapping[str, Any]] | None = None,
    progress: bool | Callable[[str, int, int], Any] | None = None,
    seed: int = 0,
    cka_parts: str = "output",
    on_error: str = "raise",
) -> RunComparison:
    """Analyse several runs on the same inputs and put their key figures side by side.

    Parameters
    ----------
    runs : Mapping[str, model or system]
        Run name -> anything :func:`hiddenlens.wrap` accepts (or a system). Architectures and
        state sizes may differ; the input size must be the same.
    inputs : Tensor or ndarray of shape (B, T, I)
        The same sequences for every run.
    which, options, seed, on_error
        As in :func:`hiddenlens._summary.run_analyses`, applied to every run.
    progress : bool or callable, optional
        ``True`` shows one bar over all runs and analyses; a callable is called as
        ``progress("<run>: <analysis>", done, total)``.
    cka_parts : {"output", "all"}, default "output"
        States entering CKA: each run's top-layer hidden state, or its whole flat state
        (including LSTM cell states).

    Returns
    -------
    RunComparison
        ``.table``, ``.results``, ``.cka``, ``.plot(analysis)``, ``.to_frame()``.

    Notes
    -----
    CKA compares the runs' representations on these inputs only; other inputs can rank the
    runs differently.
    """
    if not isinstance(runs, Mapping) or len(runs) == 0:
        raise TypeError("runs must be a non-empty mapping name -> model, e.g. "
                        "{'before': model_a, 'after': model_b}")
    if cka_parts not in ("output", "all"):
        raise ValueError(f"cka_parts must be 'output' or 'all', got {cka_parts!r}")
    names = [str(n) for n in runs]
    if len(set(names)) != len(names):
        raise ValueError("run names must be distinct as strings")
    systems = {str(n): as_system(m) for n, m in runs.items()}
    sizes = {n: s.input_size for n, s in systems.items()}
    if len(set(sizes.values())) > 1:
        raise ValueError(f"runs take different input sizes {sizes}; compare runs that read the "
                         "same inputs")
    which_list = None if which is None else ([which] if isinstance(which, str) else list(which))

    bar = None
    if progress is True:
        from tqdm.auto import tqdm

        bar = tqdm(total=None, desc="compare", leave=False)
    done = 0

    def per_run(run: str) -> Callable[[str, int, int], None] | None:
        if not progress:
            return None

        def step(name: str, _i: int, total: int) -> None:
            nonlocal done
            if name == "done":
                return
            grand = total * len(names)
            if bar is not None:
                bar.total, bar.n = grand, done
                bar.set_postfix_str(f"{run}: {name}")
            else:
                progress(f"{run}: {name}", done, grand)
            done += 1

        return step

    results: dict[str, AnalysisResults] = {}
    try:
        for n in names:
            results[n] = run_analyses(systems[n], inputs, which=which_list, options=options,
                                      progress=per_run(n), seed=seed, on_error=on_error)
        if callable(progress):
            progress("done", done, done)
    finally:
        if bar is not None:
            bar.close()

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
    table = _table(names, systems, figures)
    return RunComparison(names=tuple(names), table=table, results=results, cka=cka,
                         figures=figures, cka_parts=cka_parts)


def _table(names, systems, figures):
    import pandas as pd

    keys = [k for k in FIGURES if any(k in figures[n] for n in names)]
    ref = figures[names[0]]
    rows = []
    for n in names:
        f = figures[n]
        row: dict[str, Any] = {"kind": systems[n].kind, "state_size": systems[n].state_size}
        for k in keys:
            v = f.get(k)
            row[k] = v
            r = ref.get(k)
            if isinstance(v, str) or isinstance(r, str):
                continue
            row[f"\u0394 {k}"] = (v - r) if (v is not None and r is not None) else np.nan
        rows.append(row)
    table = pd.DataFrame(rows, index=pd.Index(names, name="run"))
    for k in keys:
        if k.startswith("fixed_points_") and table[k].notna().all():
            table[k] = table[k].astype(int)
            table[f"\u0394 {k}"] = table[f"\u0394 {k}"].astype(int)
    return table


# ---------------------------------------------------------------------- overlay plots
def _median_over_leading(a: Any) -> np.ndarray:
    arr = np.asarray(a, dtype=float)
    if arr.ndim <= 1:
        return arr.reshape(-1)
    return np.asarray(_nanmedian(arr.reshape(-1, arr.shape[-1]), axis=0))


def plot_overlay(analysis: str, results: Mapping[str, Any], ax: Any = None, **kw: Any):
    """Draw one analysis of several runs on one Axes; ``results`` maps run name -> result."""
    from ._plotting import get_axes, plain_text

    ax = get_axes(ax)
    names = list(results)
    if analysis == "fixed_points":
        classes = ("stable", "saddle", "unstable", "marginal")
        width = 0.8 / max(len(names), 1)
        for i, n in enumerate(names):
            stab = [str(s) for s in np.asarray(results[n].stability, dtype=object).ravel()]
            counts = [sum(s == c for s in stab) for c in classes]
            ax.bar(np.arange(len(classes)) + (i - (len(names) - 1) / 2) * width, counts,
                   width=width, label=n, **kw)
        ax.set_xticks(np.arange(len(classes)), classes)
        ax.set_ylabel("number of points")
        from matplotlib.ticker import MaxNLocator

        ax.yaxis.set_major_locator(MaxNLocator(integer=True))
    else:
        for n in names:
            r = results[n]
            if analysis == "spectra":
                y = _median_over_leading(r.singular_values)  # (k,)
                ax.semilogy(np.arange(1, y.size + 1), y, marker=".", label=n, **kw)
                ax.set_xlabel("singular value index")
                ax.set_ylabel("median singular value of J_t")
            elif analysis == "gradient_flow":
                y = _median_over_leading(r.norms)  # (L,)
                lags = np.asarray(r.lags, dtype=float).reshape(-1)[: y.size]
                logs = getattr(r, "log_norms", None)
                if logs is not None and not np.all(np.isfinite(y) & (y > 0)):
                    # beyond float64's range: draw the exact logs on a linear axis
                    y = _median_over_leading(logs) / np.log(10.0)
                    ax.plot(lags, y[: lags.size], label=n, **kw)
                    ax.set_ylabel("log10 of median ||d s_T / d s_t||")
                else:
                    ax.semilogy(lags, y[: lags.size], label=n, **kw)
                    ax.set_ylabel("median ||d s_T / d s_t||")
                ax.set_xlabel("lag T - t (steps)")
            elif analysis == "lyapunov":
                y = np.asarray(r.exponents, dtype=float).reshape(-1)
                ax.plot(np.arange(1, y.size + 1), y, marker=".", label=n, **kw)
                ax.set_xlabel("exponent index")
                ax.set_ylabel("Lyapunov exponent (per step)")
            elif analysis == "pca":
                y = np.cumsum(np.asarray(r.explained_variance_ratio, dtype=float).reshape(-1))
                pr = getattr(r, "participation_ratio", None)
                label = n if pr is None else f"{n} (PR {float(pr):.3g})"
                ax.plot(np.arange(1, y.size + 1), y, marker="o", label=label, **kw)
                ax.set_xlabel("number of components")
                ax.set_ylabel("cumulative explained variance")
                ax.set_ylim(0, 1.02)
            elif analysis == "memory":
                y = _median_over_leading(r.scores)
                lags = np.asarray(r.lags, dtype=float).reshape(-1)[: y.size]
                ax.plot(lags, y[: lags.size], marker=".", label=n, **kw)
                ax.set_xlabel("lag k (steps)")
                ax.set_ylabel(str(getattr(r, "score_name", None) or "memory score"))
            else:
                raise ValueError(f"unknown analysis {analysis!r}; expected one of "
                                 f"{', '.join(ANALYSES)}")
    if analysis == "lyapunov":
        ax.axhline(0.0, color="0.5", lw=0.8)
    if analysis == "memory":
        levels = {float(getattr(results[n], "threshold", np.nan)) for n in names}
        raw = all(getattr(results[n], "chance", None) is None for n in names)
        if raw and len(levels) == 1 and np.isfinite(next(iter(levels))):
            ax.axhline(next(iter(levels)), ls="--", color="0.5", lw=0.8, label="span threshold")
    ax.set_title(TITLES.get(analysis, analysis))
    ax.legend(fontsize="small")
    plain_text(ax)  # run names are the user's: plain text, not mathtext
    return ax


def plot_cka(cka: Any, names: Iterable[str], ax: Any = None, **kw: Any):
    """Draw a runs x runs CKA matrix with its values written in the cells."""
    from ._plotting import get_axes, plain_text

    ax = get_axes(ax)
    names = list(names)
    m = np.asarray(cka, dtype=float)
    im = ax.imshow(m, vmin=0.0, vmax=1.0, cmap=kw.pop("cmap", "viridis"), **kw)
    ax.set_xticks(range(len(names)), names, rotation=30, ha="right")
    ax.set_yticks(range(len(names)), names)
    for i in range(m.shape[0]):
        for j in range(m.shape[1]):
            ax.text(j, i, f"{m[i, j]:.2f}", ha="center", va="center",
                    color="black" if m[i, j] > 0.6 else "white", fontsize="small")
    ax.figure.colorbar(im, ax=ax, label="linear CKA")
    ax.set_title("Linear CKA of hidden states")
    return plain_text(ax)

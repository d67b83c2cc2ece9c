"""Memory span: how many steps back a recurrent system still holds its inputs.

Three views of one question, each a curve over the lag k = 0..max_lag: cross-validated linear
decoding of x_{t-k} from s_t (memory capacity, Jaeger 2001), the decay of an input impulse's
effect on the state trajectory, and the norm of the input sensitivity d s_t / d x_{t-k}.
"""

from __future__ import annotations

import math
import warnings
from collections.abc import Callable, Sequence
from dataclasses import dataclass
from typing import TYPE_CHECKING, Any

import numpy as np
import torch

from .._core.guard import grad_restored
from .._core.jacobians import input_jacobians, step_jacobians
from .._core.options import analysis, check_options, int_seed, progress_bar
from .._core.record import as_system, record, valid_steps
from .._core.results import Result, frozen_mapping, readonly
from .._core.stepcheck import step_errors
from .._core.systems import RecurrentSystem, refuse_random_steps
from .._core.trace import Trace
from .._core.validation import check_trace_finite, check_trace_fits

if TYPE_CHECKING:  # the aliases of the public signatures
    from .._core.aliases import ModelLike

__all__ = ["MemoryCurve", "MemoryRangeWarning", "memory_curve"]

METHODS = ("decoding", "perturbation", "sensitivity")
MODES = ("probe", "data")
DEFAULT_ALPHAS = tuple(float(a) for a in np.logspace(-4, 6, 11))

# Jacobian chunks of the sensitivity method stay below this many bytes
_CHUNK_BYTES = 64 * 2**20


class MemoryRangeWarning(RuntimeWarning):
    """A memory curve measured where the model does not work: probe inputs drove the states
    outside the range they keep on the model's own inputs, or the decoders score test R^2
    below -1 (worse than predicting the mean). Decode the model's inputs (``mode="data"``) or
    lower ``scale``; see docs/memory.md."""


# share of the probe-state values allowed outside the reference box before warning
_OUTSIDE_SHARE = 0.05
# fewer recorded states than this set no range worth checking against
_MIN_REFERENCE = 100


# ====================================================================== result
@dataclass(frozen=True, eq=False)
class MemoryCurve(Result):
    """A memory curve over lags k = 0..max_lag, from :func:`memory_curve`.

    Attributes
    ----------
    method : {"decoding", "perturbation", "sensitivity"}
    mode : {"probe", "data"}
        Probe: i.i.d. inputs generated for the analysis; data: the user's sequences.
    lags : ndarray of shape (K + 1,)
        0, 1, ..., max_lag.
    scores : ndarray of shape (K + 1,)
        Decoding: test R^2 (balanced accuracy for categorical inputs), mean over the test folds
        and over input features. Perturbation: distance between perturbed and unperturbed
        states, normalised (see ``normalize``). Sensitivity: mean norm of d s_t / d x_{t-k},
        normalised. Always the mean over the rows of ``samples``.
    spread : ndarray of shape (K + 1,)
        Standard deviation over the rows of ``samples`` (folds, impulses or source steps).
    samples : ndarray of shape (n, K + 1)
        One curve per test fold (decoding), per impulse (perturbation) or per (sequence, source
        step) pair (sensitivity), on the same scale as ``scores``.
    capacity : float
        Decoding: memory capacity sum_k max(R^2(k), 0) (categorical: the sum of chance-adjusted
        balanced accuracies, clipped at 0). Perturbation and sensitivity: the area
        sum_k scores(k), in steps.
    span : int
        The largest lag k such that the (chance-adjusted) score is at least ``threshold`` at
        every lag 0..k; -1 when lag 0 already falls short, ``max_lag`` when the curve never does
        (then raise ``max_lag``).
    threshold : float
    score_name : str
        Axis label of ``scores``.
    baseline, baseline_spread : ndarray of shape (K + 1,) or None
        Data-mode decoding only: the same readout fitted on the inputs' own recent history
        (x_t..x_{t-w}) instead of the state. Memory shows where ``scores`` rise above it.
    baseline_capacity : float or None
    chance : float or None
        Categorical decoding: the balanced accuracy of guessing, 1 / (number of classes).
    time_constant : float or None
        Perturbation and sensitivity: tau of a least-squares fit log(score) ~ c - k / tau
        (inf when the curve does not decay, 0 when it vanishes after lag 0).
    reference : float or None
        Perturbation and sensitivity: what the raw curve was divided by (mean distance or
        sensitivity at lag 0, or the state spread), so ``scores * reference`` is the raw curve.
    feature_scores : ndarray of shape (K + 1, I) or None
        Decoding with real-valued inputs: R^2 per input feature, mean over folds.
    alphas : ndarray of shape (n_folds, K + 1) or None
        Decoding: the ridge penalty chosen per fold and lag (mean over features).
    categorical : bool
    metadata : Mapping[str, Any]
        Sizes, model class, split of the folds, impulse times and the like.
    weighted_scores : ndarray of shape (K + 1,) or None
        Decoding with real-valued inputs: the variance-weighted R^2 (features weighted by their
        variance over the decoded rows, as scikit-learn's ``multioutput="variance_weighted"``),
        beside the per-feature mean in ``scores``.

    Notes
    -----
    Linear decoding gives a lower bound on what the state holds about past inputs: a nonlinear
    readout may recover more. In data mode, read ``scores`` against ``baseline``: with
    autocorrelated inputs the present input already predicts past ones. A probe-mode curve
    describes the system under the probe distribution (i.i.d. Gaussian of the given scale),
    not under the data it was trained on. The span threshold is a convention.
    """

    method: str
    mode: str
    lags: np.ndarray
    scores: np.ndarray
    spread: np.ndarray
    samples: np.ndarray
    capacity: float
    span: int
    threshold: float
    score_name: str
    baseline: np.ndarray | None = None
    baseline_spread: np.ndarray | None = None
    baseline_capacity: float | None = None
    chance: float | None = None
    time_constant: float | None = None
    reference: float | None = None
    feature_scores: np.ndarray | None = None
    alphas: np.ndarray | None = None
    categorical: bool = False
    weighted_scores: np.ndarray | None = None

    def __post_init__(self) -> None:
        for name in ("lags", "scores", "spread", "samples", "baseline", "baseline_spread",
                     "feature_scores", "alphas", "weighted_scores"):
            value = getattr(self, name)
            if value is not None:
                object.__setattr__(self, name, readonly(value))
        object.__setattr__(self, "metadata", frozen_mapping(self.metadata))
        super().__post_init__()

    @property
    def max_lag(self) -> int:
        """K, the largest lag on the curve."""
        return int(self.lags[-1])

    @property
    def adjusted_scores(self) -> np.ndarray:
        """Scores on the scale the threshold applies to: chance-adjusted for categorical
        decoding, ``(score - chance) / (1 - chance)``; otherwise the scores themselves."""
        if self.chance is None:
            return self.scores
        return readonly((self.scores - self.chance) / (1.0 - self.chance))

    def to_frame(self):
        """Table with one row per lag: score, spread and (data-mode decoding) the baseline."""
        import pandas as pd

        cols = {"score": self.scores, "spread": self.spread}
        if self.baseline is not None:
            cols["baseline"] = self.baseline
            cols["baseline_spread"] = self.baseline_spread
        frame = pd.DataFrame(cols, index=pd.Index(self.lags, name="lag"))
        frame.attrs.update(method=self.method, mode=self.mode, capacity=self.capacity,
                           span=self.span, threshold=self.threshold)
        return frame

    def plot(self, ax: Any = None, *, log: bool | None = None, **kw: Any):
        """Draw the curve with its spread, the threshold, and the baseline or chance level.

        Parameters
        ----------
        ax : matplotlib Axes, optional
        log : bool, optional
            Logarithmic score axis (default: on for perturbation and sensitivity curves).
        **kw
            Passed to ``ax.plot`` for the main curve.

        Returns
        -------
        matplotlib Axes
        """
        from .._plotting.memory import draw_memory

        return draw_memory(self, ax, log=log, **kw)

    def __repr__(self) -> str:
        return (f"MemoryCurve(method={self.method!r}, mode={self.mode!r}, "
                f"max_lag={self.max_lag}, capacity={self.capacity:.4g}, span={self.span})")


def check_alphas(alphas: Any, default: Any = DEFAULT_ALPHAS) -> np.ndarray:
    """Ridge penalties as a 1-D float array (None: ``default``), or a ValueError."""
    if alphas is None:
        return np.array(default)
    try:
        out = np.atleast_1d(np.asarray(alphas, dtype=float))
    except (TypeError, ValueError):
        out = np.array([np.nan])
    if out.ndim != 1 or out.size == 0 or not np.all(np.isfinite(out)) or np.any(out <= 0):
        raise ValueError("alphas must be one positive number or a non-empty sequence of them, "
                         f"got {alphas!r}")
    return out


# ====================================================================== entry point
@analysis("memory_curve")
def memory_curve(
    model_or_system: ModelLike,
    trace: Trace | None = None,
    *,
    max_lag: int = 50,
    method: str = "decoding",
    mode: str | None = None,
    n_sequences: int | None = None,
    n_steps: int | None = None,
    scale: float = 1.0,
    threshold: float = 0.5,
    parts: str | Sequence[str] | None = None,
    n_folds: int = 5,
    alphas: float | Sequence[float] | None = None,
    categorical: bool | None = None,
    baseline_window: int = 0,
    washout: int | None = None,
    impulse: float = 1.0,
    normalize: str | None = None,
    seed: int = 0,
    h0: Any = None,
    progress: bool | Callable[[int, int, str], Any] | None = None,
    threads: int | None = None,
    inputs: Any = None,
    reference: Trace | None = None,
    **wrap_options: Any,
) -> MemoryCurve:
    """How many steps back a recurrent system still holds its inputs, as a curve over lag.

    Parameters
    ----------
    model_or_system : RecurrentSystem, nn.Module or callable
        Anything :func:`hiddenlens.wrap` accepts (wrapped with ``wrap_options``).
    trace : Trace, optional
        A recording of the user's sequences (data mode), used as it is. Without it the system
        is driven by probe inputs, recorded through one helper. Passing the input sequences
        themselves (the 0.1 form) still works for one release, with a DeprecationWarning:
        they are recorded first.
    max_lag : int, default 50
        K, the largest lag on the curve.
    method : {"decoding", "perturbation", "sensitivity"}, default "decoding"
        decoding: cross-validated ridge readout of x_{t-k} from s_t, test R^2 per lag.
        perturbation: add an impulse to the input at t0 and follow the distance between the
        perturbed and unperturbed states. sensitivity: norm of d s_t / d x_{t-k} averaged over t.
    mode : {"probe", "data"}, optional
        Default: "data" when ``inputs`` are given, else "probe". Probe inputs are i.i.d.
        standard normal times ``scale`` (uniform random one-hot tokens times ``scale`` when
        ``categorical=True``), drawn from ``np.random.default_rng(seed)``.
    n_sequences, n_steps : int, optional
        Probe mode only: how many probe sequences of how many steps. Defaults: decoding
        ``n_folds`` sequences of ``washout + max(2000, 20 * (max_lag + 1))`` steps; perturbation
        32 of ``washout + max_lag + 1``; sensitivity 4 of ``washout + max_lag + 100``.
    scale : float, default 1.0
        Standard deviation of the probe inputs.
    threshold : float, default 0.5
        Level that defines the span (a convention; on the chance-adjusted scale for categorical
        decoding).
    parts : str or list of str, optional
        Named parts of the state to read (default: the whole state).
    n_folds : int, default 5
        Decoding: number of cross-validation folds. With at least ``n_folds`` sequences each
        fold holds out whole sequences; otherwise contiguous blocks of time, and training rows
        within ``max_lag`` steps of the held-out block are left out so no target leaks.
    alphas : float or sequence of float, optional
        Decoding: ridge penalties on standardised states, as scikit-learn's ``Ridge(alpha)``
        after ``StandardScaler``. Several values: each fold chooses one per target by exact
        leave-one-out error on its training rows (as ``RidgeCV``). Default 1e-4..1e6.
    categorical : bool, optional
        Decoding: treat the inputs as one-hot tokens and decode the token with a ridge
        classifier scored by balanced accuracy. Default: detected in data mode (every step is a
        one-hot vector and I >= 2); False in probe mode.
    baseline_window : int, default 0
        Data-mode decoding: the baseline decodes x_{t-k} from x_t, ..., x_{t-w} with
        w = ``baseline_window``; for k <= w it is 1 by construction.
    washout : int, optional
        Steps at the start of each sequence left out (default ``max_lag``): decoding rows start
        at ``max(washout, max_lag)``; impulses and sensitivity sources start at ``washout``.
    impulse : float, default 1.0
        Perturbation: the impulse size in units of the input's standard deviation (per
        feature), along a random unit direction per impulse.
    normalize : {"lag0", "spread", "none"}, optional
        Perturbation and sensitivity: divide the curve by its mean at lag 0 (default), by the
        state spread (root of the summed variance of the unperturbed states; perturbation only)
        or not at all.
    seed : int, default 0
        Seed of the local ``np.random.default_rng`` that draws the probe inputs and impulse
        directions (the folds are fixed, not drawn); the global random generators are unused.
    h0 : Tensor or ndarray, optional
        Initial states, see :func:`hiddenlens.record`.
    progress : bool, optional
        Show progress bars (default: only for long runs).
    reference : Trace, optional
        Probe mode: states recorded on the model's own inputs. When more than 5% of the probe
        states' values fall outside the box of the reference states (widened by 10% of each
        unit's range), a :class:`MemoryRangeWarning` says so: the curve then describes the
        model where its own inputs never take it. The share is in ``metadata["outside_share"]``
        (None when unchecked: no reference, or one of fewer than 100 recorded states).
    **wrap_options
        Passed to :func:`hiddenlens.wrap` when ``model_or_system`` is not yet a system.

    Returns
    -------
    MemoryCurve

    Notes
    -----
    Memory capacity MC = sum_k max(R^2(k), 0) (Jaeger 2001); negative test R^2 (a readout worse
    than predicting the mean) counts as no memory. For a linear system with N states and one
    i.i.d. input, MC <= N. All lags are fitted together: one standardised state matrix and one
    eigendecomposition of its Gram matrix per fold serve every lag and every penalty.

    Cautions: linear decoding gives a lower bound on what the state holds; in data mode read the
    curve against ``baseline`` (autocorrelated inputs predict their own past); a probe-mode
    curve depends on the probe distribution and ``scale``; the span threshold is a convention.
    See docs/memory.md.

    References
    ----------
    H. Jaeger (2001). Short term memory in echo state networks. GMD Report 152.
    O. L. White, D. D. Lee, H. Sompolinsky (2004). Short-term memory in orthogonal neural
    networks. Physical Review Letters 92, 148102.

    Examples
    --------
    >>> import torch, hiddenlens
    >>> gru = torch.nn.GRU(4, 32, batch_first=True)
    >>> curve = hiddenlens.memory_curve(gru, max_lag=20)
    >>> curve.capacity, curve.span  # doctest: +SKIP
    """
    check_options("memory_curve", locals())
    seed = int_seed(seed)  # a numpy Generator gives one draw; local generators from here
    system = as_system(model_or_system, **wrap_options)
    if inputs is not None:  # the 0.1 keyword form memory_curve(system, inputs=x)
        if trace is not None:
            raise TypeError("memory_curve got both a trace and inputs; pass only the trace")
        trace = inputs
    inputs = trace
    if isinstance(trace, Trace):
        check_trace_fits(system, trace, "memory_curve")
        check_trace_finite(trace, "memory_curve", ("inputs",))  # the decoded sources
        if h0 is not None:
            raise ValueError("h0 was given with a trace, which holds its own initial states; "
                             "drop h0, or record with hiddenlens.record(system, inputs, h0)")
    elif trace is not None:
        warnings.warn(
            "memory_curve(system, inputs) is deprecated; record first and pass the trace: "
            "memory_curve(system, hiddenlens.record(system, inputs, h0))",
            DeprecationWarning, stacklevel=3)
    opts = _check_options(system, inputs, locals())
    if isinstance(trace, Trace) and opts["method"] != "decoding":
        check_trace_finite(trace, "memory_curve", ("initial",))  # the steps start there
        refuse_random_steps(system, trace.initial[:1], trace.inputs[:1, 0])  # before any draw
    if reference is not None:
        if not isinstance(reference, Trace):
            raise TypeError(f"reference must be a Trace recorded on the model's own inputs, got "
                            f"{type(reference).__name__}; pass hiddenlens.record(model, inputs)")
        if reference.state_size != system.state_size:
            raise ValueError(f"reference has {reference.state_size} states but the system has "
                             f"{system.state_size}; record the reference with the same model")
    with grad_restored():
        trace, in_std = _get_trace(system, inputs, opts, h0, progress)
        cols = trace.columns(opts["parts"])
        outside = None
        if reference is not None and opts["mode"] == "probe" \
                and reference.batch_size * reference.n_steps >= _MIN_REFERENCE:
            outside = _outside_share(trace, reference, cols)
        meta = {
            "model_class": system.source,
            "state_columns": int(len(cols)),
            "parts": list(system.parts) if opts["parts"] is None else opts["parts"],
            "n_sequences": trace.batch_size,
            "n_steps": trace.n_steps,
            "washout": opts["washout"],
            "scale": opts["scale"] if opts["mode"] == "probe" else None,
            "seed": seed,
            "outside_share": None if outside is None else outside[0],
        }
        if opts["method"] == "decoding":
            return _decoding(trace, cols, opts, meta, progress)
        if opts["method"] == "perturbation":
            return _perturbation(system, trace, cols, in_std, opts, meta)
        # a module step function's parameters may require grad
        with torch.no_grad(), step_errors(system):
            return _sensitivity(system, trace, cols, in_std, opts, meta, progress)


# ====================================================================== options and inputs
def _positive(name: str, value: Any) -> float:
    if isinstance(value, bool) or not isinstance(value, (int, float, np.number)) \
            or not math.isfinite(value) or value <= 0:
        raise ValueError(f"{name} must be a positive finite number, got {value!r}")
    return float(value)


def _check_options(system: RecurrentSystem, inputs: Any, given: dict[str, Any]) -> dict[str, Any]:
    """The options of :func:`memory_curve` checked together and completed with their defaults.

    ``method``, ``max_lag``, ``n_folds``, the counts and ``impulse`` have passed
    ``check_options`` (their declared constraints) already; what is left here depends on
    other options or on the system.
    """
    method = given["method"]
    mode = _check_mode(system, inputs, given)
    max_lag, n_folds = int(given["max_lag"]), int(given["n_folds"])
    washout = max_lag if given["washout"] is None else int(given["washout"])
    threshold = given["threshold"]
    if isinstance(threshold, bool) or not isinstance(threshold, (int, float, np.number)) \
            or not math.isfinite(threshold):
        raise ValueError(f"threshold must be a finite number, got {threshold!r}")
    if method == "decoding" and not 0 < threshold <= 1:
        # R^2 and chance-adjusted accuracy never exceed 1: no lag could reach the level
        raise ValueError(f"threshold must be in (0, 1] for decoding scores (R^2 or "
                         f"chance-adjusted accuracy), got {threshold!r}")
    alphas = check_alphas(given["alphas"])
    normalize = _check_normalize(method, given["normalize"])
    categorical = given["categorical"]
    if categorical not in (None, True, False):
        raise ValueError(f"categorical must be True, False or None (detect), got "
                         f"{categorical!r}")
    if categorical and system.input_size < 2:
        raise ValueError("categorical=True needs one-hot inputs with at least 2 features; the "
                         f"system has input_size={system.input_size}")
    parts = _check_parts(system, given["parts"])
    defaults = {"decoding": (n_folds, washout + max(2000, 20 * (max_lag + 1))),
                "perturbation": (32, washout + max_lag + 1),
                "sensitivity": (4, washout + max_lag + 100)}[method]
    counts = [d if given[n] is None else int(given[n])
              for n, d in zip(("n_sequences", "n_steps"), defaults, strict=True)]
    return {
        "method": method, "mode": mode, "max_lag": max_lag, "washout": washout,
        "n_folds": n_folds, "threshold": float(threshold), "alphas": alphas,
        "normalize": normalize, "categorical": categorical, "parts": parts,
        "n_sequences": counts[0], "n_steps": counts[1],
        "scale": _positive("scale", given["scale"]),
        "impulse": float(given["impulse"]),
        "baseline_window": int(given["baseline_window"]),
        "rng": np.random.default_rng(given["seed"]),
    }


def _check_mode(system: RecurrentSystem, inputs: Any, given: dict[str, Any]) -> str:
    """"probe" or "data": the given mode, or the one the inputs imply, checked against them."""
    if system.input_size == 0:
        raise ValueError(f"the {system.source} system takes no inputs (input_size=0), so it "
                         "has no memory of inputs to measure; wrap a system with inputs")
    mode = given["mode"]
    if mode is None:
        mode = "probe" if inputs is None else "data"
    if mode not in MODES:
        raise ValueError(f"mode must be 'probe', 'data' or None, got {mode!r}")
    if mode == "data" and inputs is None:
        raise ValueError("mode='data' needs inputs of shape (B, T, I); pass them or use "
                         "mode='probe'")
    if mode == "probe" and inputs is not None:
        raise ValueError("inputs were given with mode='probe', which generates its own inputs; "
                         "drop inputs or use mode='data'")
    if mode == "data":
        for name in ("n_sequences", "n_steps"):
            if given[name] is not None:
                raise ValueError(f"{name} applies to probe mode only; in data mode the inputs "
                                 "set the number and length of sequences")
    return mode


def _check_normalize(method: str, normalize: Any) -> str | None:
    """None for decoding; "lag0" (the default), "spread" or "none" for the other methods."""
    if method == "decoding":
        if normalize is not None:
            raise ValueError("normalize applies to the perturbation and sensitivity methods; "
                             "decoding scores are R^2 or balanced accuracy (drop normalize)")
        return None
    normalize = "lag0" if normalize is None else normalize
    allowed = ("lag0", "spread", "none") if method == "perturbation" else ("lag0", "none")
    if normalize not in allowed:
        raise ValueError(f"normalize must be one of {', '.join(map(repr, allowed))} for "
                         f"method={method!r}, got {normalize!r}")
    return normalize


def _check_parts(system: RecurrentSystem, parts: Any) -> list[str] | None:
    """The named parts as a list (None: the whole state), each one of the system's."""
    if parts is None:
        return None
    if not isinstance(parts, (str, Sequence)):
        raise TypeError(f"parts must be a part name or a list of them, got "
                        f"{type(parts).__name__}; the system has parts "
                        f"{', '.join(map(repr, system.parts))}")
    names = [parts] if isinstance(parts, str) else list(parts)
    unknown = [n for n in names if n not in system.parts]
    if not names or unknown:
        raise ValueError(f"parts {unknown or parts!r} not found; the system has parts "
                         f"{', '.join(map(repr, system.parts))}")
    return names


def _outside_share(trace: Trace, reference: Trace, cols: np.ndarray) -> tuple[float, ...]:
    """Share of the probe states' values outside the reference box, and warn above 5%.

    The box: each unit's range over the reference states, widened by 10% of that range (the
    reachable region of find_fixed_points). Returns (share, the value the probes reach
    on the unit pushed furthest past its range, that unit's reference range lo, hi)."""
    ref = np.asarray(reference.states[..., cols], dtype=np.float64).reshape(-1, cols.size)
    got = np.asarray(trace.states[..., cols], dtype=np.float64).reshape(-1, cols.size)
    lo, hi = ref.min(axis=0), ref.max(axis=0)
    pad = 0.1 * (hi - lo)
    share = float(np.mean((got < lo - pad) | (got > hi + pad)))
    # the unit the probes push furthest past its range, in units of that range
    width = np.where(hi > lo, hi - lo, 1.0)
    excess = np.maximum(lo - got.min(axis=0), got.max(axis=0) - hi) / width  # (S,)
    u = int(np.argmax(excess))
    far = float(got[:, u].min() if lo[u] - got[:, u].min() > got[:, u].max() - hi[u]
                else got[:, u].max())
    if share > _OUTSIDE_SHARE:
        warnings.warn(
            f"the probe inputs drive {100 * share:.1f}% of the state values outside the range "
            f"they keep on the model's own inputs (state unit {int(cols[u])} reaches {far:.3g} "
            f"where the inputs keep it in [{lo[u]:.3g}, {hi[u]:.3g}]): the memory curve "
            "describes the model where its own inputs never take it; decode the model's inputs "
            "(mode='data') or lower scale", MemoryRangeWarning, stacklevel=4)
    return share, far, float(lo[u]), float(hi[u])


def _get_trace(system: RecurrentSystem, inputs: Any, opts: dict[str, Any], h0: Any,
               progress: bool | None) -> tuple[Trace, np.ndarray]:
    """Record the states; return the trace and the inputs' standard deviation per feature."""
    I = system.input_size
    if opts["mode"] == "probe":
        B, T, rng = opts["n_sequences"], opts["n_steps"], opts["rng"]
        if opts["categorical"]:
            tokens = rng.integers(I, size=(B, T))
            x = np.eye(I)[tokens] * opts["scale"]  # (B, T, I)
        else:
            x = rng.standard_normal((B, T, I)) * opts["scale"]  # (B, T, I)
        # probe inputs feed the recurrent part itself, never a front end
        trace = record(system.without_front(), x, h0, progress=progress)
        _check_bounded(trace, "probe inputs", "lower scale=")
        std = np.full(I, opts["scale"]) if not opts["categorical"] else trace.inputs.reshape(
            -1, I).std(axis=0)
        return trace, std
    # a given trace is the data (the one path that records is probe mode, above)
    trace = inputs if isinstance(inputs, Trace) else record(system, inputs, h0, progress=progress)
    _check_bounded(trace, "inputs", "scale the inputs down")
    real = valid_steps(trace)  # padded steps of variable-length sequences are no data
    x = (trace.inputs.reshape(-1, I) if real is None else trace.inputs[real]).astype(
        np.float64)  # (N, I) the real steps
    if opts["categorical"] is None:
        opts["categorical"] = bool(I >= 2 and _is_one_hot(x))
    elif opts["categorical"] and not _is_one_hot(x):
        raise ValueError("categorical=True but the inputs are not one-hot: every step must have "
                         "exactly one positive entry and zeros elsewhere; pass categorical=False "
                         "for real-valued inputs")
    if I and not np.any(x.std(axis=0) > 0):
        # a constant target is "decoded" perfectly at every lag: that is no memory
        raise ValueError("the inputs are constant (every feature has zero spread over samples "
                         "and steps), so no memory of them can be measured; pass inputs that "
                         "vary or use mode='probe'")
    return trace, x.std(axis=0)


def _check_bounded(trace: Trace, what: str, fix: str) -> None:
    """Refuse states that overflowed or became NaN, naming the first step and sample."""
    st = trace.states
    real = valid_steps(trace)
    if real is not None:
        st = np.where(real[:, :, None], st, 0.0)  # padded states are not analysed
    if np.isfinite(st.max()) and np.isfinite(st.min()):
        return
    finite = np.isfinite(st).all(axis=2)  # (B, T)
    t = int(np.flatnonzero(~finite.all(axis=0))[0])
    b = int(np.flatnonzero(~finite[:, t])[0])
    kind = "overflowed to inf" if np.isinf(st[b, t]).any() else "became NaN"
    raise ValueError(f"the states {kind} at step t={t} of sample {b} on these {what}: the "
                     f"dynamics explode, and a memory curve needs bounded states; {fix} or "
                     "analyse a stable model")


def _lengths(trace: Trace) -> np.ndarray:
    """Real steps of each sequence (B,): the trace's lengths, or its n_steps for all."""
    real = valid_steps(trace)
    if real is None:
        return np.full(trace.batch_size, trace.n_steps)
    return real.sum(axis=1)


def _is_one_hot(x: np.ndarray) -> bool:
    nonzero = x != 0
    return bool(np.all(nonzero.sum(axis=1) == 1) and np.all(x[nonzero] > 0))


def _span(adjusted: np.ndarray, threshold: float) -> int:
    below = np.flatnonzero(~(adjusted >= threshold))  # NaN counts as below
    return int(below[0]) - 1 if below.size else int(adjusted.size - 1)


# ====================================================================== decoding
def _decoding(trace: Trace, cols: np.ndarray, opts: dict[str, Any], meta: dict[str, Any],
              progress: bool | None) -> MemoryCurve:
    B, T_all = trace.batch_size, trace.n_steps
    n_b = _lengths(trace)  # (B,) real steps of each sequence
    T = int(n_b.max())
    K = opts["max_lag"]
    t_start = max(opts["washout"], K)
    if T - t_start < 2 * opts["n_folds"]:
        raise ValueError(
            f"sequences of {T} steps leave {max(T - t_start, 0)} usable steps after "
            f"max(washout, max_lag) = {t_start}; decoding needs at least {2 * opts['n_folds']}: "
            "pass longer sequences, a smaller max_lag or a smaller washout"
        )
    b_idx = np.repeat(np.arange(B), T - t_start)
    t_idx = np.tile(np.arange(t_start, T), B)
    keep = t_idx < n_b[b_idx]  # rows on real steps only
    b_idx, t_idx = b_idx[keep], t_idx[keep]
    X = trace.states[b_idx, t_idx][:, cols].astype(np.float64)  # (N, S)
    folds, split = _folds(b_idx, t_idx, B, t_start, T, opts["n_folds"], gap=K)
    inputs = trace.inputs.astype(np.float64)  # (B, T, I)
    span_real = (np.arange(T_all)[None, :] >= t_start - K) & (
        np.arange(T_all)[None, :] < n_b[:, None])  # (B, T) every target step
    categorical = bool(opts["categorical"])
    lags = np.arange(K + 1)
    chance = None
    if categorical:
        tokens = inputs.argmax(axis=2)  # (B, T)
        classes = np.unique(tokens[span_real])  # every target step
        target = _Targets(tokens, b_idx, t_idx, classes=classes)
        chance = 1.0 / classes.size
    else:
        target = _Targets(inputs, b_idx, t_idx)
    fold_scores, feature_scores, chosen = _ridge_cv(X, target, K, folds, opts["alphas"],
                                                    progress)
    scores = fold_scores.mean(axis=0)
    adjusted = scores if chance is None else (scores - chance) / (1.0 - chance)
    weighted = None
    if not categorical:
        var = inputs[span_real].var(axis=0)  # (I,) over every target step
        if var.sum() > 0:
            weighted = feature_scores @ var / var.sum()  # (K + 1,)
        if np.nanmin(scores) < -1:
            warnings.warn(
                f"the decoders score test R^2 down to {np.nanmin(scores):.3g} (below -1: "
                "worse than predicting the mean); the states may lie far outside what the "
                "readout saw in training (probe inputs pushing the state out of its usual "
                "range, or too few rows): decode the model's own inputs (mode='data') or "
                "lower scale", MemoryRangeWarning, stacklevel=4)
    base = base_spread = base_cap = None
    if opts["mode"] == "data":
        w = opts["baseline_window"]
        if w > t_start:
            raise ValueError(f"baseline_window={w} reaches before the first usable step "
                             f"{t_start}; pass baseline_window <= {t_start} or a larger washout")
        window = np.stack([inputs[b_idx, t_idx - j] for j in range(w + 1)], axis=1)
        base_folds, _, _ = _ridge_cv(window.reshape(len(b_idx), -1), target, K, folds,
                                     opts["alphas"], progress=False)
        base, base_spread = base_folds.mean(axis=0), base_folds.std(axis=0)
        base_adj = base if chance is None else (base - chance) / (1.0 - chance)
        base_cap = float(np.clip(base_adj, 0, None).sum())
    meta.update(split=split, n_folds=len(folds), n_rows=int(X.shape[0]), first_row_step=t_start,
                n_train=[int(len(tr)) for tr, _ in folds],
                baseline_window=opts["baseline_window"] if base is not None else None)
    return MemoryCurve(
        method="decoding", mode=opts["mode"], lags=lags, scores=scores,
        spread=fold_scores.std(axis=0), samples=fold_scores,
        capacity=float(np.clip(adjusted, 0, None).sum()),
        span=_span(adjusted, opts["threshold"]), threshold=opts["threshold"],
        score_name="balanced accuracy" if categorical else "test R²",
        baseline=base, baseline_spread=base_spread, baseline_capacity=base_cap, chance=chance,
        feature_scores=None if categorical else feature_scores, alphas=chosen,
        categorical=categorical, metadata=meta, weighted_scores=weighted,
    )


def _folds(b_idx: np.ndarray, t_idx: np.ndarray, B: int, t_start: int, T: int, n_folds: int,
           gap: int) -> tuple[list[tuple[np.ndarray, np.ndarray]], str]:
    """Contiguous test folds: whole sequences when there are enough, else blocks of time.

    Rows of a block split are neighbours in time of the held-out block; training rows within
    ``gap`` steps of it are dropped, so no state in training shares inputs of the last ``gap``
    steps with a held-out row.
    """
    folds = []
    if B >= n_folds:
        for group in np.array_split(np.arange(B), n_folds):
            test = np.isin(b_idx, group)
            folds.append((np.flatnonzero(~test), np.flatnonzero(test)))
        return folds, "sequences"
    for block in np.array_split(np.arange(t_start, T), n_folds):
        lo, hi = int(block[0]), int(block[-1])
        test = (t_idx >= lo) & (t_idx <= hi)
        train = (t_idx < lo - gap) | (t_idx > hi + gap)
        if train.sum() < 2:
            raise ValueError(
                f"too few steps for {n_folds} time-block folds with a gap of {gap} steps "
                f"({T - t_start} usable steps per sequence); pass more or longer sequences "
                f"(at least n_folds={n_folds} sequences split by sequence), fewer folds or a "
                "smaller max_lag"
            )
        folds.append((np.flatnonzero(train), np.flatnonzero(test)))
    return folds, "time blocks"


class _Targets:
    """Targets x_{t-k} of every row for a range of lags, built on demand (lag-major columns).

    Real-valued: I columns per lag. Categorical: one +-1 column per class per lag (the coding
    of scikit-learn's RidgeClassifier), the alpha chosen per lag.
    """

    def __init__(self, source: np.ndarray, b_idx: np.ndarray, t_idx: np.ndarray,
                 classes: np.ndarray | None = None) -> None:
        self.source, self.b, self.t, self.classes = source, b_idx, t_idx, classes
        self.width = source.shape[2] if classes is None else classes.size

    def block(self, lags: np.ndarray) -> np.ndarray:
        """(N, n_lags * width) targets for ``lags``."""
        vals = self.source[self.b[:, None], self.t[:, None] - lags[None, :]]  # (N, n_lags[, I])
        if self.classes is None:
            return vals.reshape(len(self.b), -1)
        onehot = vals[:, :, None] == self.classes[None, None, :]  # (N, n_lags, C)
        return (2.0 * onehot - 1.0).reshape(len(self.b), -1)

    def tokens(self, lags: np.ndarray) -> np.ndarray:
        return self.source[self.b[:, None], self.t[:, None] - lags[None, :]]  # (N, n_lags)


def _standardise(X_train: np.ndarray, X_test: np.ndarray) -> tuple[np.ndarray, np.ndarray]:
    """Scale by the training rows' mean and (population) std, as scikit-learn's StandardScaler;
    constant columns keep scale 1."""
    mu = X_train.mean(axis=0)
    sd = X_train.std(axis=0)
    sd[sd < 10 * np.finfo(float).eps * np.maximum(1.0, np.abs(mu))] = 1.0
    return (X_train - mu) / sd, (X_test - mu) / sd


def _ridge_cv(X: np.ndarray, target: _Targets, K: int,
              folds: list[tuple[np.ndarray, np.ndarray]], alphas: np.ndarray,
              progress: bool | None = None) -> tuple[np.ndarray, np.ndarray, np.ndarray]:
    """Cross-validated ridge readouts for all lags 0..K at once.

    NOTE: [One factorisation for every lag and penalty]
    On standardised, centred training states Xc, the ridge solution for any target column y is
    W(a) = V diag(1 / (lam + a)) V^T Xc^T y with Xc^T Xc = V diag(lam) V^T, so one
    eigendecomposition per fold serves all lags, features and penalties. The exact
    leave-one-out residual (y_i - yhat_i) / (1 - h_ii), with h_ii = 1/n + sum_j P_ij^2 / (lam_j + a)
    and P = Xc V (the intercept is unpenalised), chooses the penalty per target as
    scikit-learn's RidgeCV does; for classes, the squared residuals of a lag's class columns
    are summed, as RidgeClassifierCV does.

    Returns
    -------
    fold_scores : (n_folds, K + 1) test R^2 (mean over features) or balanced accuracy
    feature_scores : (K + 1, I) R^2 per feature averaged over folds (categorical: NaN)
    chosen : (n_folds, K + 1) chosen penalty (mean over the lag's targets)
    """

    n_folds = len(folds)
    width = target.width
    categorical = target.classes is not None
    fold_scores = np.empty((n_folds, K + 1))
    feature = np.full((n_folds, K + 1, width), np.nan)
    chosen = np.empty((n_folds, K + 1))
    # lags per block: keep the (N, m) target blocks near 16 M numbers
    per_block = max(1, int(16e6 // max(1, X.shape[0] * width)))
    work = X.shape[0] * X.shape[1] * (K + 1) * width * len(alphas) * len(folds)
    show = progress if progress is not None else work > 5e10
    for f, (tr, te) in enumerate(progress_bar(progress, iterable=folds, total=len(folds),
                                              label="decoding folds", auto=bool(show))):
        Xtr, Xte = _standardise(X[tr], X[te])
        Xtr -= Xtr.mean(axis=0)  # exact centring after rounding
        lam, V = np.linalg.eigh(Xtr.T @ Xtr)
        lam = np.clip(lam, 0.0, None)
        P, Pte = Xtr @ V, Xte @ V  # (n, S), (n_te, S)
        P2 = P * P
        n = len(tr)
        for start in range(0, K + 1, per_block):
            lags = np.arange(start, min(K + 1, start + per_block))
            Y = target.block(lags)  # (N, m)
            Ytr, Yte = Y[tr], Y[te]
            ybar = Ytr.mean(axis=0)
            Yc = Ytr - ybar
            A = P.T @ Yc  # (S, m)
            best = np.full(Y.shape[1], np.inf)
            best_a = np.full(Y.shape[1], alphas.max())  # kept if every error is NaN
            for a in alphas:
                d = 1.0 / (lam + a)  # (S,)
                with np.errstate(divide="ignore"):  # h_ii = 1: that penalty is never chosen
                    inv = 1.0 / (1.0 - (1.0 / n + P2 @ d))  # 1 / (1 - h_ii), (n,)
                loo = P @ (d[:, None] * A)  # fitted values, (n, m)
                np.subtract(Yc, loo, out=loo)
                with np.errstate(invalid="ignore", over="ignore"):
                    loo *= inv[:, None]  # leave-one-out residuals
                    err = np.einsum("ij,ij->j", loo, loo)  # (m,)
                if categorical:  # one penalty per lag, shared by its class columns
                    err = np.repeat(err.reshape(len(lags), width).sum(axis=1), width)
                better = err < best
                best[better], best_a[better] = err[better], a
            coef = A / (lam[:, None] + best_a[None, :])  # (S, m), in the eigenbasis
            pred = Pte @ coef + ybar  # (n_te, m)
            chosen[f, lags] = best_a.reshape(len(lags), width).mean(axis=1)
            if categorical:
                fold_scores[f, lags] = _balanced_accuracy(
                    target.tokens(lags)[te], pred.reshape(len(te), len(lags), width),
                    target.classes, present=np.unique(target.tokens(lags)[tr]))
            else:
                r2 = _r2(Yte, pred).reshape(len(lags), width)
                feature[f, lags] = r2
                fold_scores[f, lags] = r2.mean(axis=1)
    return fold_scores, feature.mean(axis=0), chosen


def _r2(y: np.ndarray, pred: np.ndarray) -> np.ndarray:
    """Per-column R^2 on the test rows, with scikit-learn's r2_score conventions for constant
    targets (1 when predicted exactly, else 0)."""
    sse = ((y - pred) ** 2).sum(axis=0)
    sst = ((y - y.mean(axis=0)) ** 2).sum(axis=0)
    with np.errstate(divide="ignore", invalid="ignore"):
        r2 = 1.0 - sse / sst
    return np.where(sst > 0, r2, np.where(sse > 0, 0.0, 1.0))


def _balanced_accuracy(true: np.ndarray, decision: np.ndarray, classes: np.ndarray,
                       present: np.ndarray) -> np.ndarray:
    """Mean recall over the classes present in ``true``, per lag: (n_lags,).

    ``decision`` (n, n_lags, C); classes absent from the training rows are never predicted.
    """
    decision = np.where(np.isin(classes, present)[None, None, :], decision, -np.inf)
    pred = classes[decision.argmax(axis=2)]  # (n, n_lags)
    recalls = []
    for c in classes:
        is_c = true == c
        count = is_c.sum(axis=0)
        hits = (is_c & (pred == c)).sum(axis=0)
        recalls.append(np.where(count > 0, hits / np.maximum(count, 1), np.nan))
    return np.nanmean(np.stack(recalls), axis=0)


# ====================================================================== perturbation
def _impulse_times(T: int, washout: int, K: int, probe: bool) -> np.ndarray:
    if washout + K >= T:
        raise ValueError(
            f"sequences of {T} steps are too short for an impulse at step {washout} (washout) "
            f"followed by max_lag={K} steps; pass longer sequences, a smaller max_lag or a "
            "smaller washout"
        )
    if probe:
        return np.array([washout])
    # one impulse per max_lag + 1 steps: the segments after them do not overlap
    return np.arange(washout, T - K, K + 1)


def _perturbation(system: RecurrentSystem, trace: Trace, cols: np.ndarray, in_std: np.ndarray,
                  opts: dict[str, Any], meta: dict[str, Any]) -> MemoryCurve:
    K, I = opts["max_lag"], trace.input_size
    n_b = _lengths(trace)  # (B,)
    t0s = _impulse_times(int(n_b.max()), opts["washout"], K, opts["mode"] == "probe")
    if not np.any(in_std > 0):
        raise ValueError("the inputs are constant, so an impulse sized by their standard "
                         "deviation is zero; pass inputs that vary or use mode='probe'")
    b_idx = np.repeat(np.arange(trace.batch_size), t0s.size)
    t_idx = np.tile(t0s, trace.batch_size)
    inside = t_idx + K < n_b[b_idx]  # the impulse and its K steps lie on real steps
    b_idx, t_idx = b_idx[inside], t_idx[inside]
    P = b_idx.size
    steps = t_idx[:, None] + np.arange(K + 1)[None, :]  # (P, K+1)
    x = trace.inputs[b_idx[:, None], steps]  # (P, K+1, I)
    u = opts["rng"].standard_normal((P, I))
    u /= np.linalg.norm(u, axis=1, keepdims=True)
    delta = opts["impulse"] * in_std[None, :] * u  # (P, I)
    x_pert = x.copy()
    x_pert[:, 0] += delta
    start = trace.previous_states()[b_idx, t_idx]  # (P, S)
    # both trajectories in one batched run, so they share rounding
    both = torch.as_tensor(np.concatenate([x, x_pert]), dtype=system.dtype)
    s0 = torch.as_tensor(np.concatenate([start, start]), dtype=system.dtype)
    runs = system.run(both, s0).to(torch.float64).numpy()  # (2P, K+1, S)
    dist = np.linalg.norm(runs[P:, :, cols] - runs[:P, :, cols], axis=2)  # (P, K+1)
    if opts["normalize"] == "lag0":
        reference = float(dist[:, 0].mean())
        if not reference > 0:
            raise ValueError("the impulse leaves the selected state unchanged at lag 0, so the "
                             "curve cannot be normalised by it; pass normalize='spread' or "
                             "'none', or other parts")
    elif opts["normalize"] == "spread":
        real = valid_steps(trace)
        states = (trace.states[:, :, cols].reshape(-1, cols.size) if real is None
                  else trace.states[real][:, cols]).astype(np.float64)
        reference = float(np.sqrt(states.var(axis=0).sum()))
        if not reference > 0:
            raise ValueError("the states do not vary, so normalize='spread' has nothing to "
                             "divide by; pass normalize='lag0' or 'none'")
    else:
        reference = 1.0
    samples = dist / reference
    scores = samples.mean(axis=0)
    meta.update(impulse_times=t0s.tolist(), n_impulses=int(P), impulse=opts["impulse"],
                input_std=in_std.tolist(), normalize=opts["normalize"])
    return MemoryCurve(
        method="perturbation", mode=opts["mode"], lags=np.arange(K + 1), scores=scores,
        spread=samples.std(axis=0), samples=samples, capacity=float(scores.sum()),
        span=_span(scores, opts["threshold"]), threshold=opts["threshold"],
        score_name=_score_name("distance", opts["normalize"]),
        time_constant=_time_constant(scores, system.dtype), reference=reference,
        categorical=bool(opts["categorical"]), metadata=meta,
    )


def _score_name(what: str, normalize: str) -> str:
    return {"lag0": f"{what} / {what} at lag 0", "spread": f"{what} / state spread",
            "none": what}[normalize]


def _time_constant(scores: np.ndarray, dtype: torch.dtype) -> float:
    """tau of a least-squares fit of log(score) = c - k / tau over the lags before the curve
    first falls to the rounding floor of ``dtype``."""
    if scores.size < 2 or not scores[0] > 0:
        return float("nan")
    floor = 100 * torch.finfo(dtype).eps * scores[0]
    low = np.flatnonzero(~(scores > floor))
    n = int(low[0]) if low.size else scores.size
    if n < 2:
        return 0.0
    k = np.arange(n, dtype=np.float64)
    slope = np.polyfit(k, np.log(scores[:n]), 1)[0]
    return float(-1.0 / slope) if slope < 0 else float("inf")


# ====================================================================== sensitivity
def _sensitivity(system: RecurrentSystem, trace: Trace, cols: np.ndarray, in_std: np.ndarray,
                 opts: dict[str, Any], meta: dict[str, Any],
                 progress: bool | None) -> MemoryCurve:
    """Mean norm of d s_t / d x_{t-k} over t.

    NOTE: [Input sensitivity by forward products, in time chunks, on a log scale]
    For a source step tau, Q_0 = B_tau = dF/dx at step tau and Q_k = J_{tau+k} Q_{k-1} with
    J_t = dF/ds at step t, so Q_k = d s_{tau+k} / d x_tau. The sources alive at step t (the
    last K + 1) sit side by side in one (S, (K + 1) * I) block per sequence, source tau in
    slot tau mod (K + 1), so one batched matmul with J_t advances them all and the new source
    overwrites the slot of the one that has just reached lag K. J and B come from
    hiddenlens._core.jacobians in chunks of steps, never for all steps at once. Each Q is kept at
    unit norm with its log scale carried separately, so long products neither overflow nor
    underflow; means over sources are taken with logsumexp. Cost: B * T * (K + 1) * S^2 * I.
    """

    K, I, S = opts["max_lag"], trace.input_size, trace.state_size
    B = trace.batch_size
    n_b = _lengths(trace)  # (B,)
    T = int(n_b.max())  # steps past every sequence's end are never needed
    L = K + 1
    t_a = opts["washout"]
    t_b = T - K  # sources tau in [t_a, t_b): every lag 0..K is observed
    if t_b <= t_a:
        raise ValueError(
            f"sequences of {T} steps are too short: sources start at step {t_a} (washout) and "
            f"need max_lag={K} steps after them; pass longer sequences, a smaller max_lag or a "
            "smaller washout"
        )
    n_src = t_b - t_a
    scale_x = torch.as_tensor(in_std, dtype=torch.float64)  # per unit of input spread
    prev = torch.as_tensor(trace.previous_states(), dtype=system.dtype)  # (B, T, S)
    x = torch.tensor(trace.inputs, dtype=system.dtype)  # (B, T, I)
    cols_t = None if cols.size == S else torch.as_tensor(cols)
    Q = torch.zeros(B, S, L, I, dtype=torch.float64)  # slot j: source tau = j mod L
    logc = torch.full((B, L), -math.inf, dtype=torch.float64)
    lognorm = torch.full((B, n_src, L), -math.inf, dtype=torch.float64)
    chunk = max(1, int(_CHUNK_BYTES // max(1, B * S * (S + I) * 8)))
    show = progress if progress is not None else B * (T - t_a) * S * S * L * I > 2e10
    slots = torch.arange(L)
    for c0 in progress_bar(progress, iterable=range(t_a, T, chunk),
                           total=len(range(t_a, T, chunk)), label="input sensitivity",
                           auto=bool(show)):
        c1 = min(T, c0 + chunk)
        p = prev[:, c0:c1].reshape(-1, S)
        xi = x[:, c0:c1].reshape(-1, I)
        J = step_jacobians(system, p, xi).to(torch.float64).reshape(B, c1 - c0, S, S)
        n_new = max(0, min(c1, t_b) - c0)
        if n_new:
            Bin = input_jacobians(system, p, xi).reshape(B, c1 - c0, S, I)[:, :n_new]
            Bin = Bin.to(torch.float64) * scale_x  # (B, n_new, S, I)
        for i, t in enumerate(range(c0, c1)):
            Q = torch.bmm(J[:, i], Q.view(B, S, L * I)).view(B, S, L, I)
            slot = t % L  # its old source has passed lag K
            if t < t_b:
                Q[:, :, slot] = Bin[:, i]
                logc[:, slot] = 0.0
            else:
                Q[:, :, slot] = 0.0
                logc[:, slot] = -math.inf
            norm = torch.linalg.vector_norm(Q, dim=(1, 3))  # (B, L)
            Q /= torch.where(norm > 0, norm, torch.ones_like(norm))[:, None, :, None]
            logc += torch.log(norm)
            lag = (t - slots) % L
            src = t - lag
            ok = (src >= t_a) & (src < t_b)
            if cols_t is None:
                lognorm[:, src[ok] - t_a, lag[ok]] = logc[:, ok]
            else:
                part = torch.linalg.vector_norm(Q[:, cols_t][:, :, ok], dim=(1, 3))
                lognorm[:, src[ok] - t_a, lag[ok]] = torch.log(part) + logc[:, ok]
    # sources whose K later steps all lie on real steps of their sequence
    whole = (np.arange(t_a, t_b)[None, :] < (n_b - K)[:, None]).reshape(-1)  # (B*n_src,)
    flat = lognorm.reshape(B * n_src, K + 1)[torch.from_numpy(whole)]  # (N_src, K+1)
    log_mean = torch.logsumexp(flat, dim=0) - math.log(flat.shape[0])  # (K+1,)
    if opts["normalize"] == "lag0":
        log_ref = float(log_mean[0])
        if log_ref == -math.inf:
            raise ValueError("the inputs do not reach the selected state at lag 0, so the "
                             "curve cannot be normalised by it; pass normalize='none' or "
                             "other parts")
    else:
        log_ref = 0.0
    samples = torch.exp(flat - log_ref).numpy()
    scores = torch.exp(log_mean - log_ref).numpy()
    meta.update(n_sources=int(flat.shape[0]), first_source_step=t_a, input_std=in_std.tolist(),
                normalize=opts["normalize"], log_reference=log_ref)
    with np.errstate(over="ignore", invalid="ignore"):
        spread = samples.std(axis=0)
    return MemoryCurve(
        method="sensitivity", mode=opts["mode"], lags=np.arange(K + 1), scores=scores,
        spread=spread, samples=samples, capacity=float(scores.sum()),
        span=_span(scores, opts["threshold"]), threshold=opts["threshold"],
        score_name=_score_name("‖ds_t/dx_(t-k)‖", opts["normalize"]),
        time_constant=_time_constant(scores, system.dtype),
        reference=float(np.exp(np.float64(log_ref))) if log_ref < 709 else float("inf"),
        categorical=bool(opts["categorical"]), metadata=meta,
    )

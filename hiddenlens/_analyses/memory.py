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
from .._core.options import analysis, check_options, int_seed
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
    trace = _trace_or_inputs(trace, inputs)
    inputs = trace
    if isinstance(trace, Trace):
        _check_given_trace(system, trace, h0)
    elif trace is not None:
        warnings.warn(
            "memory_curve(system, inputs) is deprecated; record first and pass the trace: "
            "memory_curve(system, hiddenlens.record(system, inputs, h0))",
            DeprecationWarning, stacklevel=3)
    opts = _check_options(system, inputs, locals())
    # the three methods, each in its own module (which imports the shared pieces from here)
    from .memory_decoding import _decoding
    from .memory_perturbation import _perturbation
    from .memory_sensitivity import _sensitivity

    if isinstance(trace, Trace) and opts["method"] != "decoding":
        check_trace_finite(trace, "memory_curve", ("initial",))  # the steps start there
        refuse_random_steps(system, trace.initial[:1], trace.inputs[:1, 0])  # before any draw
    _check_reference(system, reference)
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


def _trace_or_inputs(trace: Any, inputs: Any) -> Any:
    """The trace, or the inputs of the 0.1 keyword form memory_curve(system, inputs=x)."""
    if inputs is not None:
        if trace is not None:
            raise TypeError("memory_curve got both a trace and inputs; pass only the trace")
        return inputs
    return trace


def _check_given_trace(system: RecurrentSystem, trace: Trace, h0: Any) -> None:
    check_trace_fits(system, trace, "memory_curve")
    check_trace_finite(trace, "memory_curve", ("inputs",))  # the decoded sources
    if h0 is not None:
        raise ValueError("h0 was given with a trace, which holds its own initial states; "
                         "drop h0, or record with hiddenlens.record(system, inputs, h0)")


def _check_reference(system: RecurrentSystem, reference: Any) -> None:
    if reference is None:
        return
    if not isinstance(reference, Trace):
        raise TypeError(f"reference must be a Trace recorded on the model's own inputs, got "
                        f"{type(reference).__name__}; pass hiddenlens.record(model, inputs)")
    if reference.state_size != system.state_size:
        raise ValueError(f"reference has {reference.state_size} states but the system has "
                         f"{system.state_size}; record the reference with the same model")


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



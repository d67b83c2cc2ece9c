"""Lyapunov spectra of input-driven recurrent systems by the QR (Benettin) method.

The state trajectory is run first (fast fused kernels); a tangent frame is then carried along it
with explicit step Jacobians (batched over chunks of steps) or with Jacobian-vector products, and
re-orthonormalised by QR. See docs/lyapunov.md for the definition and the cautions.
"""

from __future__ import annotations

import math
import warnings
from collections.abc import Callable
from dataclasses import dataclass, replace
from typing import TYPE_CHECKING, Any

import numpy as np
import torch

from .._core.guard import grad_restored
from .._core.jacobians import step_jacobians, step_jvp
from .._core.options import analysis, check_options, int_seed, progress_bar
from .._core.record import as_system, initial_states, record
from .._core.results import Result, frozen_mapping, readonly
from .._core.stepcheck import state_only, step_errors
from .._core.systems import RecurrentSystem, refuse_random_steps
from .._core.threads import single_thread
from .._core.trace import Trace
from .._core.validation import as_dtype, as_sequences, check_trace_finite, check_trace_fits

if TYPE_CHECKING:  # the aliases of the public signatures
    from .._core.aliases import ArrayLike, ModelLike, TraceOrInputs

__all__ = ["LyapunovSpectrum", "lyapunov_spectrum", "kaplan_yorke_dimension",
           "StationaryTrajectoryWarning"]

METHODS = ("auto", "jacobian", "jvp")

# Elements of step Jacobians held at once by the explicit route (2**23: 32 MB in float32,
# 64 MB in float64); the torch.func fallback needs a few times that while it builds them.
_JACOBIAN_BUDGET = 2**23
# Steps per chunk never exceed this, so the progress bar moves and buffers stay small.
_MAX_CHUNK_STEPS = 1024
# The convergence curve keeps at most this many points (log-spaced once there are more steps).
_MAX_CURVE_POINTS = 1000
# Below this many flops per step (J Q and the QR, all samples) the step loop runs on one thread.
_SMALL_STEP_FLOPS = 2**21

# NOTE: [Choosing between explicit Jacobians and JVPs]
# Per step and sample, the explicit route costs one Jacobian (closed form for nn.RNN/GRU/LSTM:
# a few S^2 elementwise operations, memory-bound; autograd for a step function: S reverse
# passes, batched over a chunk of steps) plus the product J Q (2 S^2 k flops); the JVP route
# costs k tangents through the step (closed form: the gate weights applied to k vectors; a step
# function: forward-mode autograd) plus a fixed dispatch overhead per step that cannot be shared
# across steps, since the frame of step t+1 needs the QR of step t. The QR is common to both.
# Measured in benchmarks/bench_lyapunov.py (B=1, float32, one thread): explicit Jacobians win
# below S=512 at every k; from S=512 on, JVPs win for few exponents: up to k of about S/128 for
# modules (whose Jacobians are cheap; between S/128 and S/32 the two tie within noise) and S/16
# for step functions; for k near S explicit Jacobians win or tie everywhere.
_JVP_MIN_STATE = 512
_JVP_MAX_K_FRACTION = {"module": 1 / 128, "callable": 1 / 16}


def _choose_method(system: RecurrentSystem, k: int) -> str:
    S = system.state_size
    fraction = _JVP_MAX_K_FRACTION["module" if system.is_module else "callable"]
    return "jvp" if S >= _JVP_MIN_STATE and k <= fraction * S else "jacobian"


# ---------------------------------------------------------------------- result
@dataclass(frozen=True, eq=False)
class LyapunovSpectrum(Result):
    """The k largest Lyapunov exponents of a system driven by given inputs.

    Exponents are in natural log per step (divide by the step length for a sampled
    continuous-time flow), in the order the QR method finds them: descending, except that two
    nearly equal exponents may come out in either order at finite length.

    Attributes
    ----------
    exponents : ndarray of shape (k,)
        Mean over samples of the per-sample estimates.
    per_sample : ndarray of shape (B, k)
        Estimate for each input sequence (and initial state).
    std : ndarray of shape (k,)
        Spread over samples: standard deviation with ddof=1 (NaN when B == 1).
    running : ndarray of shape (P, k)
        Running estimate (mean over samples) after ``running_steps[p]`` counted steps: the
        convergence curve. All steps up to 1000 points, log-spaced beyond.
    running_steps : ndarray of shape (P,)
        Number of counted steps behind each row of ``running``.
    kaplan_yorke : float
        Kaplan-Yorke (Lyapunov) dimension of ``exponents``; NaN when the k exponents are too few
        to decide it (their partial sums never turn negative and k < S).
    state_size : int
        S.
    n_steps : int
        Counted steps per sample (the input length minus ``warmup``).
    warmup : int
        Steps run before counting, which let the state and the frame settle.
    method : {"jacobian", "jvp"}
        How the tangent frame was advanced.
    qr_every : int
        Steps between re-orthonormalisations.
    dtype : str
        Precision of the states, Jacobians and frame ("float32" or "float64"); the logarithms
        are always summed in float64.
    metadata : Mapping[str, Any]
        System source and kind, batch size, seed.

    Notes
    -----
    The exponents of an input-driven system belong to the system together with its input
    statistics: other inputs give other exponents. Finite-length estimates carry a bias of order
    1/T from the start of the frame and the state (hence ``warmup``), and random fluctuations of
    order 1/sqrt(T); read ``running`` to see whether the estimate has settled.
    """

    exponents: np.ndarray
    per_sample: np.ndarray
    std: np.ndarray
    running: np.ndarray
    running_steps: np.ndarray
    kaplan_yorke: float
    state_size: int
    n_steps: int
    warmup: int
    method: str
    qr_every: int
    dtype: str

    def __post_init__(self) -> None:
        for name in ("exponents", "per_sample", "std", "running"):
            object.__setattr__(self, name, readonly(getattr(self, name), np.float64))
        object.__setattr__(self, "running_steps", readonly(self.running_steps, np.int64))
        object.__setattr__(self, "metadata", frozen_mapping(self.metadata))
        super().__post_init__()

    @property
    def k(self) -> int:
        """Number of exponents."""
        return self.exponents.shape[0]

    @property
    def batch_size(self) -> int:
        """B, the number of samples."""
        return self.per_sample.shape[0]

    def __repr__(self) -> str:
        shown = ", ".join(f"{v:.4g}" for v in self.exponents[:6])
        more = ", ..." if self.k > 6 else ""
        return (f"LyapunovSpectrum(exponents=[{shown}{more}] per step, k={self.k}, "
                f"S={self.state_size}, B={self.batch_size}, n_steps={self.n_steps}, "
                f"warmup={self.warmup}, kaplan_yorke={self.kaplan_yorke:.4g}, "
                f"method={self.method!r})")

    def plot(self, ax: Any = None, *, kind: str = "convergence", **kw: Any):
        """Draw the convergence curve or the spectrum; returns the Axes.

        Parameters
        ----------
        ax : matplotlib Axes, optional
            Where to draw (a new figure by default).
        kind : {"convergence", "spectrum"}
            ``"convergence"``: running estimate of each exponent against the number of counted
            steps (log axis); a trustworthy estimate flattens out. ``"spectrum"``: exponents
            against their index, with the spread over samples as error bars.
        **kw
            Passed to ``ax.plot`` (convergence) or ``ax.errorbar`` (spectrum).
        """
        from .._plotting.lyapunov import draw_lyapunov

        return draw_lyapunov(self, ax, kind=kind, **kw)

    def to_frame(self, table: str = "exponents"):
        """The result as a pandas DataFrame.

        Parameters
        ----------
        table : {"exponents", "per_sample", "running"}
            ``"exponents"``: one row per exponent (index, exponent, std, min and max over
            samples). ``"per_sample"``: one row per (sample, index). ``"running"``: one row per
            point of the convergence curve, columns ``steps`` and ``exponent_1`` ...
        """
        import pandas as pd

        idx = np.arange(1, self.k + 1)
        if table == "exponents":
            return pd.DataFrame({
                "index": idx, "exponent": self.exponents, "std": self.std,
                "min": self.per_sample.min(axis=0), "max": self.per_sample.max(axis=0),
            })
        if table == "per_sample":
            B = self.batch_size
            return pd.DataFrame({
                "sample": np.repeat(np.arange(B), self.k), "index": np.tile(idx, B),
                "exponent": self.per_sample.reshape(-1),
            })
        if table == "running":
            cols = {"steps": self.running_steps}
            cols.update({f"exponent_{i}": self.running[:, i - 1] for i in idx})
            return pd.DataFrame(cols)
        raise ValueError(f"table must be 'exponents', 'per_sample' or 'running', got {table!r}")


def kaplan_yorke_dimension(exponents: ArrayLike, state_size: int | None = None) -> float:
    """Kaplan-Yorke dimension ``j + (λ_1 + ... + λ_j) / |λ_{j+1}|`` of a Lyapunov spectrum.

    ``j`` is the largest index whose partial sum is non-negative (Kaplan & Yorke 1979).

    Parameters
    ----------
    exponents : array-like of shape (k,)
        The k largest exponents (sorted here in descending order).
    state_size : int, optional
        S. When the partial sums of all k exponents stay non-negative the dimension is S if
        k == S, and undecided (NaN) if k < S or S is not given.

    Returns
    -------
    float
        0.0 when the largest exponent is negative.
    """
    try:
        arr = np.asarray(exponents, dtype=np.float64)
    except (TypeError, ValueError):
        raise TypeError(f"exponents must be numbers (an array of shape (k,)), got "
                        f"{type(exponents).__name__}; pass LyapunovSpectrum.exponents") from None
    if arr.ndim > 1:
        raise ValueError(f"exponents must be one spectrum of shape (k,), got shape "
                         f"{arr.shape}; pass LyapunovSpectrum.exponents or one row of "
                         "per_sample")
    if state_size is not None and (isinstance(state_size, bool)
                                   or not isinstance(state_size, (int, np.integer))
                                   or not arr.size <= state_size):
        raise ValueError(f"state_size must be an integer >= {arr.size} (the number of "
                         f"exponents given), got {state_size!r}")
    lam = np.sort(arr.reshape(-1))[::-1]
    if lam.size == 0 or np.isnan(lam).any():
        return float("nan")
    if lam[0] < 0:
        return 0.0
    with np.errstate(invalid="ignore"):
        csum = np.cumsum(lam)
    j = int(np.argmin(csum >= 0)) if (csum < 0).any() else lam.size
    if j == lam.size:
        return float(lam.size) if state_size == lam.size else float("nan")
    if not np.isfinite(lam[j]):  # a direction collapsed in one step: no fractional part
        return float(j)
    return float(j + csum[j - 1] / abs(lam[j]))


# ---------------------------------------------------------------------- the analysis
@analysis("lyapunov_spectrum")
def lyapunov_spectrum(
    system: ModelLike,
    trace: TraceOrInputs | None = None,
    k: int | None = None,
    *,
    warmup: int | None = None,
    h0: Any = None,
    dtype: Any = None,
    method: str = "auto",
    qr_every: int = 1,
    seed: int = 0,
    progress: bool | Callable[[int, int, str], Any] | None = None,
    threads: int | None = None,
    inputs: Any = None,
    steps: int | None = None,
    keep_trace: bool = False,
    **wrap_options: Any,
) -> LyapunovSpectrum:
    """The k largest Lyapunov exponents of a recurrent system along given input sequences.

    The QR (Benettin) method: a random orthonormal frame Q of k tangent vectors is carried along
    the trajectory, ``Q, R = qr(J_t Q)`` with ``J_t = d s_t / d s_{t-1}``, and
    ``λ_i = (1/T) Σ_t log |R_ii(t)|`` over the counted steps.

    Parameters
    ----------
    system : RecurrentSystem, nn.Module or callable
        Anything :func:`hiddenlens.wrap` accepts (wrapped with ``wrap_options``), or a system.
    trace : Trace
        A recording (:func:`hiddenlens.record`) whose trajectory is reused: its ``states``,
        ``initial`` states and ``inputs`` (B, T, ...); each sample gives its own estimate. For an
        autonomous map (``input_size=0``) record zeros of shape (B, T, 0). Passing the input
        sequences themselves (the 0.1 form) still works for one release, with a
        DeprecationWarning: they are recorded first. For an autonomous map (``input_size=0``)
        the number of steps may be given instead (or None with ``steps=``); B is then the batch
        of ``h0`` (1 without one). A step function of the state alone, ``f(s)``, is accepted for
        an autonomous map.
    k : int, optional
        How many of the largest exponents (default: all S).
    warmup : int, optional
        Leading steps that advance the state and the frame without counting (default T // 10).
        They remove the transient of the state and let the random frame align with the most
        expanding directions; without them the estimate carries a bias of order 1/T.
    h0 : Tensor or ndarray, optional
        Only with the deprecated inputs form: initial states, as in :func:`hiddenlens.record`.
    dtype : {None, "float32", "float64"}
        Precision of states, Jacobians and frame. None: the system's own (float32 for a model
        wrapped here). float64 converts the weight copies of a module-backed system; a step
        function must then compute in float64.
    method : {"auto", "jacobian", "jvp"}
        ``"jacobian"``: explicit step Jacobians (closed form for nn.RNN/GRU/LSTM), batched over
        chunks of steps, then ``J_t @ Q``. ``"jvp"``: k Jacobian-vector products per step,
        never materialising J. ``"auto"`` picks the faster one from S, k and whether the
        Jacobian has a closed form (see Notes).
    qr_every : int, default 1
        Re-orthonormalise every this many steps (products of Jacobians in between). Larger
        values save QR work but lose accuracy on the smallest exponents once the exponents
        spread over more than about ``log(1/eps) / qr_every`` per step (eps the dtype's
        precision); keep 1 unless the spectrum is narrow.
    seed : int, default 0
        Seed of the random initial frame (local numpy generators, one per sample; the global
        RNGs are untouched). Column j of the frame does not depend on k, so ``k < S`` gives the
        first k exponents of the full spectrum.
    progress : bool, optional
        Show a progress bar (default: only for long runs).
    steps : int, optional
        Number of steps of an autonomous map (instead of zero-width inputs).
    keep_trace : bool, default False
        Keep the trajectory the exponents were computed on as ``metadata["trace"]`` (a
        :class:`~hiddenlens.Trace`), so its states need no second run.
    **wrap_options
        Passed to :func:`hiddenlens.wrap` when ``system`` is not yet a system.

    Returns
    -------
    LyapunovSpectrum
        ``metadata["caution"]`` says when the estimate is not conclusive: fewer than
        ``MIN_COUNTED_STEPS`` counted steps, or a trajectory that sits at a fixed point.

    Warns
    -----
    StationaryTrajectoryWarning
        When the trajectory never leaves its starting state or settles on a fixed point (the
        default ``h0`` of zeros is a fixed point of many autonomous flows, e.g. Lorenz): the
        exponents are then the fixed point's, not the attractor's.

    Raises
    ------
    ValueError
        Bad options, or a trajectory that becomes NaN/Inf (the exponents need bounded states).
    TypeError
        A step function that computes in another precision than the one asked for.

    Notes
    -----
    Cost per step and sample: the QR of an (S, k) frame, about 4 S k^2 flops, plus ``J Q``
    (2 S^2 k) and the Jacobian for the explicit route, or k tangents through the step for the
    JVP route (the gate weights applied to k vectors for nn modules, forward-mode autograd for
    a step function). The explicit route holds the Jacobians of one chunk of steps
    (about 32 MB in float32); ``method="jvp"`` holds none. ``"auto"`` uses JVPs for large
    states with few exponents (``S >= 512`` and ``k <= S/128`` for modules, ``k <= S/16`` for
    step functions), where they were measured to be faster.

    The exponents of an input-driven system depend on the statistics of the inputs; exponents
    of a sampled flow are per step (divide by the step length). Stop the run with Ctrl-C at any
    time: nothing outside the call is changed.

    References
    ----------
    Benettin, Galgani, Giorgilli & Strelcyn (1980), Meccanica 15, 9-20.
    Eckmann & Ruelle (1985), Rev. Mod. Phys. 57, 617-656.
    Kaplan & Yorke (1979), in Functional Differential Equations and Approximation of Fixed
    Points, Springer, vol. 730, 204-227.
    """
    check_options("lyapunov_spectrum", locals())
    seed = int_seed(seed)  # a numpy Generator gives one draw; local generators from here
    system = _system_of(system, dtype, wrap_options)
    dt = system.dtype
    trace, recorded, x, h0 = _inputs_of(system, trace, inputs, steps, h0, dt)
    B, T, _ = x.shape
    S = system.state_size
    k = _check_k(k, S)
    from .._core.record import valid_steps

    real = valid_steps(trace) if recorded else None
    lengths = None if real is None else real.sum(axis=1)  # (B,) steps of each sequence
    # padded sequences: each counts its own real steps after the shared warm-up
    warmup = _check_warmup(warmup, T if lengths is None else int(lengths.min()))
    qr_every = _check_positive_int(qr_every, "qr_every", "re-orthonormalise every step: 1")
    chosen = _check_method_and_seed(system, k, method, seed)
    if recorded:
        s0 = torch.as_tensor(np.array(trace.initial), dtype=dt)  # (B, S)
    else:
        s0 = initial_states(system, h0, B)  # (B, S)

    # flops of one step of the state (up to 4 gates) and of the frame (J Q and its QR)
    state_flops = B * 8 * S * (S + system.input_size)
    frame_flops = B * (2 * S * S * k + 4 * S * k * k)
    with grad_restored(), torch.no_grad(), step_errors(system):
        if system.kind == "callable":
            refuse_random_steps(system, s0[:1], x[:1, 0])  # before any step draws
            _check_step_dtype(system, s0, x[:, 0])
        if recorded:
            states = torch.as_tensor(np.array(trace.states), dtype=dt)  # (B, T, S)
        else:
            with _threads_for(state_flops):
                states = system.run(x, s0, progress=False)  # (B, T, S)
        _check_trajectory(states, system)
        with _threads_for(frame_flops):
            sums, running, running_steps = _qr_sweep(
                system, x, s0, states, k, warmup, qr_every, chosen, int(seed), progress,
                lengths)

    counts = np.full(B, T - warmup) if lengths is None else lengths - warmup  # (B,)
    per_sample = sums / counts[:, None]  # (B, k)
    exponents = per_sample.mean(axis=0)
    std = per_sample.std(axis=0, ddof=1) if B > 1 else np.full(k, np.nan)
    meta: dict[str, Any] = {"source": system.source, "kind": system.kind, "batch_size": B,
                            "input_steps": T, "seed": int(seed),
                            "fingerprint": system.fingerprint, "counted_steps": T - warmup}
    if lengths is not None:
        meta["counted_steps"] = counts.tolist()  # per sequence: its own length - warmup
    meta["state_growth"], caution = _caution(states, s0, warmup, lengths, counts)
    if caution:
        meta["caution"] = caution
    # leaky RNNs built with dt: exponents per unit of the model's own time too
    meta["dt"] = system.dt
    meta["exponents_per_unit_time"] = (None if system.dt is None
                                       else (np.asarray(exponents) / system.dt).tolist())
    if keep_trace:
        from .._core.record import trace_metadata

        rec = Trace(states.numpy(), s0.numpy(), x.numpy(), system.parts,
                    trace_metadata(system, tuple(x.shape)))
        meta["trace"] = rec
    return LyapunovSpectrum(
        exponents=exponents, per_sample=per_sample, std=std, running=running,
        running_steps=running_steps, kaplan_yorke=kaplan_yorke_dimension(exponents, S),
        state_size=S, n_steps=int(counts.max()), warmup=warmup, method=chosen,
        qr_every=qr_every,
        dtype=str(dt).replace("torch.", ""),
        metadata=meta,
    )


def _system_of(system: Any, dtype: Any, wrap_options: dict[str, Any]) -> RecurrentSystem:
    """The system to analyse: wrapped with ``wrap_options`` where needed, in ``dtype``."""
    if dtype is not None and not isinstance(system, RecurrentSystem):
        wrap_options.setdefault("dtype", dtype)
    if callable(system) and not isinstance(system, (RecurrentSystem, torch.nn.Module)) \
            and wrap_options.get("input_size", 0) == 0 and state_only(system) is not None:
        system, wrap_options = state_only(system), {**wrap_options, "input_size": 0}
    system = as_system(system, **wrap_options)
    if dtype is not None:
        system = _with_dtype(system, as_dtype(dtype))
    return system


def _inputs_of(system: RecurrentSystem, trace: Any, inputs: Any, steps: Any, h0: Any,
               dt: torch.dtype) -> tuple[Any, bool, torch.Tensor, Any]:
    """(trace, recorded?, inputs (B, T, I) in the system's order, h0 still to use).

    A number of steps of an autonomous map is recorded here; bare input sequences (the
    deprecated form) are kept as inputs, to be run from ``h0``.
    """
    if inputs is not None:  # the 0.1 keyword form lyapunov_spectrum(system, inputs=x)
        if trace is not None:
            raise TypeError("lyapunov_spectrum got both a trace and inputs; pass only the trace")
        trace = inputs
    if steps is not None or (isinstance(trace, (int, np.integer))
                             and not isinstance(trace, bool)):
        # an autonomous map driven for a number of steps: recorded here, from h0
        trace = record(system, _autonomous_inputs(system, trace, steps, h0, dt), h0)
        h0 = None
    if trace is None:
        raise TypeError("lyapunov_spectrum needs a trace: lyapunov_spectrum(system, trace) with "
                        "trace = hiddenlens.record(system, inputs)")
    if isinstance(trace, Trace):
        check_trace_fits(system, trace, "lyapunov_spectrum")
        check_trace_finite(trace, "lyapunov_spectrum")
        if h0 is not None:
            raise ValueError("h0 was given with a trace, which holds its own initial states; "
                             "drop h0, or record with hiddenlens.record(system, inputs, h0)")
        # the recorded trajectory is reused as it is (inputs already in the system's order)
        return trace, True, torch.as_tensor(np.array(trace.inputs), dtype=dt), h0  # (B, T, I)
    warnings.warn(
        "lyapunov_spectrum(system, inputs) is deprecated; record first and pass the trace: "
        "lyapunov_spectrum(system, hiddenlens.record(system, inputs, h0))",
        DeprecationWarning, stacklevel=4)
    x = as_sequences(trace, system.input_size, dt, what=f"the {system.source} system")
    if system.time_reversed:
        x = x.flip(1)
    return trace, False, x, h0


def _check_method_and_seed(system: RecurrentSystem, k: int, method: Any, seed: Any) -> str:
    """The method to use (``"auto"`` resolved), after checking ``method`` and ``seed``."""
    if method not in METHODS:
        raise ValueError(f"method must be one of {METHODS}, got {method!r}")
    if isinstance(seed, bool) or not isinstance(seed, (int, np.integer)) or seed < 0:
        raise ValueError(f"seed must be a non-negative integer, got {seed!r}")
    return _choose_method(system, k) if method == "auto" else method


def _caution(states: torch.Tensor, s0: torch.Tensor, warmup: int, lengths: Any,
             counts: np.ndarray) -> tuple[float, str | None]:
    """(state growth, caution or None) of the run: a stationary trajectory (also warned
    about), unbounded states, too few counted steps."""
    cautions = []
    still = _stationary(states, s0, warmup)
    if still:
        cautions.append(still)
        warnings.warn(f"{still}; the exponents are those of that point, not of an attractor: "
                      "start from another h0 (e.g. a small random state) or drive the system",
                      StationaryTrajectoryWarning, stacklevel=3)
    growth = state_growth(states, warmup, lengths)
    fewest = int(counts.min())
    if is_unbounded(growth, fewest):
        cautions.append(f"the states grow without bound (about x{math.exp(growth):.3g} per "
                        "step over the counted steps): the exponent measures divergence, not "
                        "chaos")
    if fewest < MIN_COUNTED_STEPS:
        cautions.append(f"from only {fewest} counted step{'s' if fewest != 1 else ''} "
                        f"(fewer than {MIN_COUNTED_STEPS}): not conclusive, run longer inputs")
    return growth, "; ".join(cautions) if cautions else None


#: Fewer counted steps than this mark the exponents as not conclusive (``metadata["caution"]``).
MIN_COUNTED_STEPS = 100

# States growing more than this factor over the last half of the counted steps are taken as
# unbounded (a transient onto a bounded attractor is over by then; common practice: chaos needs
# a bounded trajectory, and a bounded attractor's norm varies by far less than this).
_UNBOUNDED_FACTOR = 30.0


def state_growth(states: torch.Tensor, warmup: int, lengths: Any = None) -> float:
    """Log growth rate per step of the state norm over the last half of the counted steps of
    the states (B, T, S), median over samples (0.0 from a single counted step). With
    ``lengths`` (B,), each sample counts its own steps only (padding left out)."""
    T = states.shape[1]
    ends = np.full(states.shape[0], T) if lengths is None else np.asarray(lengths)  # (B,)
    rates = []
    for b, end in enumerate(ends):
        counted = states[b, warmup:int(end)].to(torch.float64)  # (n, S)
        n = counted.shape[0]
        if n == 0:
            continue
        late = counted[n // 2:]  # (n - n // 2, S)
        logs = torch.log(torch.linalg.vector_norm(late, dim=1).clamp_min(1e-300))  # (m,)
        rates.append(float((logs[-1] - logs[0]) / max(late.shape[0] - 1, 1)))
    return float(np.median(rates)) if rates else 0.0


def is_unbounded(growth: Any, n_steps: Any) -> bool:
    """Whether a ``state_growth`` over ``n_steps`` counted steps means unbounded states."""
    try:
        g, n = float(growth), int(n_steps)
    except (TypeError, ValueError):
        return False
    span = max(n - n // 2 - 1, 1)
    return math.isfinite(g) and g > 0 and g * span > math.log(_UNBOUNDED_FACTOR)


class StationaryTrajectoryWarning(RuntimeWarning):
    """The trajectory of :func:`lyapunov_spectrum` sits at a fixed point or never left h0."""


def _stationary(states: torch.Tensor, s0: torch.Tensor, warmup: int) -> str | None:
    """A description when every sample's counted states (B, T, S) stay at one point."""
    counted = states[:, warmup:]  # (B, n, S)
    scale = 1.0 + counted.abs().amax(dim=(1, 2))  # (B,)
    eps = 1e3 * torch.finfo(states.dtype).eps
    moved = (counted - counted[:, -1:]).abs().amax(dim=(1, 2)) > eps * scale
    if bool(moved.any()):
        return None
    left = (states - s0[:, None]).abs().amax(dim=(1, 2)) > eps * scale
    if not bool(left.any()):
        return "the trajectory never left its initial state h0 (h0 is a fixed point)"
    if counted.shape[1] < 2:
        return None
    return "the trajectory settled on a fixed point before the counted steps"


def _autonomous_inputs(system: RecurrentSystem, inputs: Any, steps: Any, h0: Any,
                       dt: torch.dtype) -> Any:
    """Zero-width inputs (B, T, 0) for an autonomous map given by a number of steps."""
    if steps is None and not (isinstance(inputs, (int, np.integer))
                              and not isinstance(inputs, bool)):
        if inputs is None:
            raise ValueError("inputs is None: pass input sequences (B, T, I), or for an "
                             "autonomous map (input_size=0) the number of steps, steps=T")
        return inputs
    if steps is not None and inputs is not None:
        raise ValueError("pass either inputs or steps=, not both (steps= is for autonomous "
                         "maps, which take no inputs)")
    T = inputs if steps is None else steps
    if isinstance(T, bool) or not isinstance(T, (int, np.integer)) or T < 1:
        raise ValueError(f"steps must be a positive integer (the number of steps), got {T!r}")
    if system.input_size != 0:
        raise ValueError(f"a number of steps drives only an autonomous map (input_size=0), but "
                         f"{system.source} takes {system.input_size} input features; pass "
                         f"inputs of shape (B, T, {system.input_size})")
    B = 1
    if h0 is not None and getattr(h0, "ndim", 0) >= 2:
        B = int(h0.shape[-2])
    return torch.zeros(B, int(T), 0, dtype=dt)


# ---------------------------------------------------------------------- the sweep
def _qr_sweep(system, x, s0, states, k, warmup, qr_every, method, seed, progress,
              lengths=None):
    """Carry the frame along the trajectory; return per-sample log sums and the curve.

    ``lengths`` (B,): real steps of right-padded sequences; logs of later steps are not
    counted, and a QR is due at each sequence's last real step.

    Returns
    -------
    sums : ndarray of shape (B, k), float64
        Σ log |R_ii| over the counted steps.
    running : ndarray of shape (P, k)
    running_steps : ndarray of shape (P,)
    """

    B, T, S = states.shape
    dt = states.dtype
    n_counted = T - warmup
    last_steps: set[int] = set()
    n_b = counts_b = carry_b = None
    if lengths is not None:
        n_counted = int(lengths.max()) - warmup
        last_steps = {int(n) - 1 for n in lengths}
        n_b = torch.as_tensor(lengths)  # (B,)
        counts_b = (n_b - warmup).to(torch.float64)
        carry_b = torch.zeros(B, k, dtype=torch.float64)
    # s_{t-1} and x_t, time first so that each step's block is contiguous
    prev = torch.cat([s0.unsqueeze(1), states[:, :-1]], dim=1).transpose(0, 1).contiguous()
    xt = x.transpose(0, 1).contiguous()  # (T, B, I)
    del states

    Q = torch.linalg.qr(_random_frame(seed, B, S, k)).Q.to(dt)  # (B, S, k)

    chunk = _chunk_steps(method, B, S, T)
    points = _curve_points(n_counted, qr_every)  # counted-step numbers, 1-based
    running = np.empty((points.shape[0], k))
    p_next = 0
    sums = torch.zeros(B, k, dtype=torch.float64)
    carry = torch.zeros(k, dtype=torch.float64)
    diag = torch.ones(chunk, B, k, dtype=dt)
    show = progress if progress is not None else T * B * S * S * k > 4e10 or T * B > 2_000_000
    # NOTE: [Full frames stay in Householder form]
    # With k == S the frame is square and need not be formed: geqrf leaves Q as Householder
    # reflectors, and ormqr applies them to J directly (J @ Q, blocked BLAS-3, about 2 S^3
    # flops) instead of forming Q (4/3 S^3 at the slower speed of orgqr) and multiplying
    # (2 S^3). Measured 1.3-1.7x faster per step at S = 128-512. For k < S forming the thin Q
    # is cheaper than applying S x S reflectors.
    householder = method == "jacobian" and k == S
    reflectors = None  # (A, tau) while the frame is held as Householder reflectors
    with progress_bar(progress, total=T, label="Lyapunov QR", auto=bool(show), unit="step") as bar:
        for t0 in range(0, T, chunk):
            t1 = min(T, t0 + chunk)
            C = t1 - t0
            J = _chunk_jacobians(system, prev[t0:t1], xt[t0:t1]) if method == "jacobian" \
                else None  # (C, B, S, S)
            diag.fill_(1.0)  # steps without a QR add log 1 = 0
            Q, reflectors = _carry_frame(system, method, Q, reflectors, J, prev, xt, diag,
                                         t0, C, (warmup, qr_every, T, last_steps),
                                         householder)
            logs = diag[:C].to(torch.float64).abs_().log_()  # (C, B, k)
            if lengths is not None:  # padded steps count nothing (their frame is not used)
                pad = torch.arange(t0, t1)[:, None] >= n_b[None, :]  # (C, B)
                logs[pad] = 0.0
            _check_logs(logs, t0, system)
            c0 = max(t0, warmup)
            if c0 < t1:
                counted = logs[c0 - t0:]  # (Cc, B, k)
                sums += counted.sum(dim=0)
                carry, carry_b, p_next = _keep_running(
                    running, points, p_next, counted, c0 - warmup + 1, t1 - warmup,
                    carry, carry_b, counts_b)
            bar.update(C)
    return sums.numpy(), running, points


def _chunk_steps(method: str, B: int, S: int, T: int) -> int:
    """Steps per chunk: the explicit route holds one chunk's Jacobians (B S S each)."""
    if method == "jacobian":
        chunk = max(1, min(_MAX_CHUNK_STEPS, _JACOBIAN_BUDGET // (B * S * S)))
    else:
        chunk = min(_MAX_CHUNK_STEPS, 64)
    return min(chunk, T)


def _carry_frame(system, method, Q, reflectors, J, prev, xt, diag, t0, C, schedule,
                 householder):
    """Carry the frame over the C steps of one chunk from step t0; the diagonals of the QRs
    done go into ``diag`` (C, B, k). ``schedule`` is (warmup, qr_every, T, last steps of
    padded sequences). Returns the frame: (Q, None), or (None, reflectors) when held as
    Householder reflectors."""
    warmup, qr_every, T, last_steps = schedule
    for j in range(C):
        t = t0 + j
        if reflectors is not None:
            Q = torch.ormqr(*reflectors, J[j], left=False)  # J @ Q, (B, S, S)
            reflectors = None
        elif method == "jacobian":
            Q = torch.matmul(J[j], Q)  # (B, S, k)
        else:
            Q = step_jvp(system, prev[t], xt[t], Q)  # (B, S, k), J never formed
        if _qr_due(t, warmup, qr_every, T) or t in last_steps:
            if householder:
                reflectors = torch.geqrf(Q)  # R on and above the diagonal of A
                diag[j] = reflectors[0].diagonal(dim1=-2, dim2=-1)
            else:
                Q, R = torch.linalg.qr(Q)
                diag[j] = R.diagonal(dim1=-2, dim2=-1)
    return Q, reflectors


def _keep_running(running, points, p_next, counted, n_lo, n_hi, carry, carry_b, counts_b):
    """Store the running estimate at the curve points among counted steps n_lo..n_hi
    (1-based) of one chunk, from its counted logs (Cc, B, k). Without ``counts_b`` (each
    padded sequence's counted steps) the mean over samples is summed (``carry``), else each
    sequence's own sums (``carry_b``). Returns (carry, carry_b, next point)."""
    if counts_b is None:
        csum = counted.mean(dim=1).cumsum(dim=0) + carry  # (Cc, k)
        carry = csum[-1].clone()
    else:  # each sequence's running mean over its own counted steps so far
        csum_b = counted.cumsum(dim=0) + carry_b  # (Cc, B, k)
        carry_b = csum_b[-1].clone()
    while p_next < points.shape[0] and points[p_next] <= n_hi:
        n = int(points[p_next])
        if counts_b is None:
            running[p_next] = (csum[n - n_lo] / n).numpy()
        else:
            per = csum_b[n - n_lo] / counts_b.clamp(max=n)[:, None]  # (B, k)
            running[p_next] = per.mean(dim=0).numpy()
        p_next += 1
    return carry, carry_b, p_next


def _random_frame(seed: int, B: int, S: int, k: int) -> torch.Tensor:
    """Gaussian frames (B, S, k) from local generators, one stream per sample.

    Column j of sample b is the same whatever k is (numpy draws sequentially), and QR keeps the
    first columns of the frame independent of the later ones, so a run with k < S reproduces the
    first k exponents of the full spectrum to rounding.
    """
    streams = np.random.SeedSequence(seed).spawn(B)
    cols = np.stack([np.random.default_rng(ss).standard_normal((k, S)) for ss in streams])
    return torch.from_numpy(cols).transpose(1, 2)  # (B, S, k)


def _threads_for(step_flops: float):
    """One torch thread for per-step work below ``_SMALL_STEP_FLOPS`` (see _core.threads)."""
    return single_thread(step_flops < _SMALL_STEP_FLOPS)


def _qr_due(t: int, warmup: int, qr_every: int, T: int) -> bool:
    if t == T - 1 or t == warmup - 1:
        return True
    if t < warmup:
        return (t + 1) % qr_every == 0
    return (t - warmup + 1) % qr_every == 0


def _curve_points(n_counted: int, qr_every: int) -> np.ndarray:
    """Counted-step numbers (1-based) where the running estimate is kept: after QR steps only."""
    qr_points = np.arange(qr_every, n_counted + 1, qr_every)
    if qr_points.size == 0 or qr_points[-1] != n_counted:
        qr_points = np.append(qr_points, n_counted)
    if qr_points.size <= _MAX_CURVE_POINTS:
        return qr_points
    geo = np.geomspace(qr_every, n_counted, _MAX_CURVE_POINTS)
    snapped = np.minimum(np.ceil(geo / qr_every).astype(np.int64) * qr_every, n_counted)
    return np.unique(np.append(snapped, n_counted))


def _chunk_jacobians(system, prev, x):
    """Step Jacobians for a chunk: prev (C, B, S), x (C, B, I) -> (C, B, S, S)."""
    C, B, S = prev.shape
    N = C * B
    flat_prev, flat_x = prev.reshape(N, S), x.reshape(N, -1)
    per_call = max(1, _JACOBIAN_BUDGET // (S * S))
    if N <= per_call:
        J = step_jacobians(system, flat_prev, flat_x)  # (N, S, S)
    else:
        J = torch.empty(N, S, S, dtype=prev.dtype)
        for a in range(0, N, per_call):
            J[a:a + per_call] = step_jacobians(system, flat_prev[a:a + per_call],
                                               flat_x[a:a + per_call])
    return J.reshape(C, B, S, S)


# ---------------------------------------------------------------------- checks
def _check_k(k, S):
    if k is None:
        return S
    if isinstance(k, bool) or not isinstance(k, (int, np.integer)) or not 1 <= k <= S:
        raise ValueError(f"k must be an integer between 1 and the state size {S}, got {k!r}; "
                         "pass k=None for all exponents")
    return int(k)


def _check_warmup(warmup, T):
    if warmup is None:
        return T // 10
    if isinstance(warmup, bool) or not isinstance(warmup, (int, np.integer)) \
            or not 0 <= warmup < T:
        raise ValueError(
            f"warmup must be an integer with 0 <= warmup < T = {T} (the number of input "
            f"steps), got {warmup!r}; the counted steps are the T - warmup after it"
        )
    return int(warmup)


def _check_positive_int(value, name, hint):
    if isinstance(value, bool) or not isinstance(value, (int, np.integer)) or value < 1:
        raise ValueError(f"{name} must be a positive integer, got {value!r} ({hint})")
    return int(value)


def _check_step_dtype(system, s0, x0):
    out = system.step(s0[:1], x0[:1])
    if isinstance(out, torch.Tensor) and out.dtype != system.dtype:
        want = str(system.dtype).replace("torch.", "")
        raise TypeError(
            f"the step function of {system.source} returned {out.dtype} states for {want} "
            f"inputs; build its constants and weights in {want}, or pass "
            f"dtype={str(out.dtype).replace('torch.', '')!r}"
        )


def _check_trajectory(states, system):
    finite = torch.isfinite(states).all(dim=2)  # (B, T)
    if bool(finite.all()):
        return
    b, t = (int(i) for i in (~finite).nonzero()[0])
    raise ValueError(
        f"the states of {system.source} became NaN/Inf at step t={t} of sample b={b}; Lyapunov "
        "exponents need a bounded trajectory: lower the input scale, shorten the inputs or "
        "start from another h0"
    )


def _check_logs(logs, t0, system):
    bad = torch.isnan(logs) | (logs == math.inf)
    if bool(bad.any()):
        j, b, i = (int(v) for v in bad.nonzero()[0])
        raise ValueError(
            f"the tangent frame of {system.source} became NaN/Inf at step t={t0 + j} of sample "
            f"b={b} (direction {i + 1}): the step Jacobian there is not finite; check the step "
            "function for non-differentiable points, or use dtype='float64'"
        )


def _with_dtype(system: RecurrentSystem, dtype: torch.dtype) -> RecurrentSystem:
    """The same system computing in ``dtype`` (weight copies converted; the model untouched)."""
    if system.dtype == dtype:
        return system
    if system.is_module:
        layers = tuple(
            replace(layer, **{name: None if getattr(layer, name) is None
                              else getattr(layer, name).to(dtype)
                              for name in ("w_ih", "w_hh", "b_ih", "b_hh")})
            for layer in system.layers)
        step_fn = None
    else:
        layers, step_fn = (), system.step
    return RecurrentSystem(
        state_size=system.state_size, input_size=system.input_size, parts=system.parts,
        dtype=dtype, kind=system.kind, source=system.source, fingerprint=system.fingerprint,
        layers=layers, step_fn=step_fn, time_reversed=system.time_reversed, model=system.model,
    )

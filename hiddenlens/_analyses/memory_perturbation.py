"""Memory by perturbation: the response of the state to impulses added to the inputs, over
the lags after each (the method="perturbation" of memory_curve)."""

from __future__ import annotations

from typing import Any

import numpy as np
import torch

from .._core.record import valid_steps
from .._core.systems import RecurrentSystem
from .._core.trace import Trace
from .memory import (
    MemoryCurve,
    _lengths,
    _score_name,
    _span,
    _time_constant,
)


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

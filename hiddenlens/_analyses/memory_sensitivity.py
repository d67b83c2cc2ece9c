"""Memory by input sensitivity: norms of the Jacobians of the state with respect to past
inputs, over lags (the method="sensitivity" of memory_curve)."""

from __future__ import annotations

import math
from typing import Any

import numpy as np
import torch

from .._core.jacobians import input_jacobians, step_jacobians
from .._core.options import progress_bar
from .._core.systems import RecurrentSystem
from .._core.trace import Trace
from .memory import (
    _CHUNK_BYTES,
    MemoryCurve,
    _lengths,
    _score_name,
    _span,
    _time_constant,
)


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

"""Time memory curves of a GRU with 256 states over 2000 steps, lags up to 100.

Prints seconds per call and the ratio to recording the same states, with 1 thread and with the
default number of threads (torch and the BLAS behind numpy). Run: python benchmarks/bench_memory.py
"""

from __future__ import annotations

import os
import time

import numpy as np
import torch
from threadpoolctl import threadpool_limits

import hiddenlens

H, I, T, MAX_LAG = 256, 8, 2000, 100


def best_of(fn, repeats=3):
    times = []
    for _ in range(repeats):
        t0 = time.perf_counter()
        out = fn()
        times.append(time.perf_counter() - t0)
    return min(times), out


def main() -> None:
    with torch.random.fork_rng():
        torch.manual_seed(0)
        gru = torch.nn.GRU(I, H, batch_first=True)
    system = hiddenlens.wrap(gru)
    rng = np.random.default_rng(0)
    default_threads = torch.get_num_threads()
    print(f"GRU H={H}, I={I}, T={T}, max_lag={MAX_LAG}; torch {torch.__version__}, "
          f"default torch.get_num_threads() = {default_threads}, os.cpu_count() = "
          f"{os.cpu_count()}, load average {os.getloadavg()[0]:.1f}")
    cases = [
        ("decoding, probe, 1 sequence (time-block folds)",
         dict(method="decoding", n_sequences=1, n_steps=T)),
        ("decoding, probe, 5 sequences (sequence folds)",
         dict(method="decoding", n_sequences=5, n_steps=T)),
        ("decoding, data, 1 sequence (with baseline)",
         dict(method="decoding", inputs=rng.standard_normal((1, T, I)).astype(np.float32))),
        ("perturbation, probe, 32 impulses", dict(method="perturbation")),
        ("sensitivity, probe, 4 x 100 source steps", dict(method="sensitivity")),
    ]
    for threads in (1, default_threads):
        torch.set_num_threads(threads)
        with threadpool_limits(threads):
            print(f"\n-- torch.get_num_threads() = {torch.get_num_threads()}, BLAS threads = "
                  f"{threads}")
            for label, kw in cases:
                kw = dict(kw)
                inputs = kw.pop("inputs", None)
                # data mode decodes a recorded trace; probe mode records its own probes
                trace = hiddenlens.record(system, inputs) if inputs is not None else None
                t_mem, curve = best_of(
                    lambda kw=kw, trace=trace: hiddenlens.memory_curve(
                        system, trace, max_lag=MAX_LAG, progress=False, **kw),
                    repeats=1 if kw["method"] == "sensitivity" else 3)
                # recording the same number of sequences and steps, for the ratio
                shape = (curve.metadata["n_sequences"], curve.metadata["n_steps"], I)
                x = rng.standard_normal(shape).astype(np.float32)
                t_rec, _ = best_of(lambda x=x: hiddenlens.record(system, x))
                print(f"{label:48s} {t_mem:7.3f} s   recording {shape[0]}x{shape[1]} steps "
                      f"{t_rec:7.4f} s   ratio {t_mem / t_rec:7.0f}   capacity "
                      f"{curve.capacity:6.2f}   span {curve.span}")
    torch.set_num_threads(1)
    with threadpool_limits(1):
        against_sklearn(system, rng)
    torch.set_num_threads(default_threads)


def against_sklearn(system, rng) -> None:
    """The same folds and penalties through scikit-learn's RidgeCV, all lags as one multi-output
    fit per fold (RidgeCV also decomposes X once per fit); 1 thread."""
    from sklearn.linear_model import RidgeCV
    from sklearn.metrics import r2_score
    from sklearn.pipeline import make_pipeline
    from sklearn.preprocessing import StandardScaler

    from hiddenlens._analyses.memory import DEFAULT_ALPHAS
    from hiddenlens._analyses.memory_decoding import _folds, _ridge_cv, _Targets

    x = rng.standard_normal((1, T, I)).astype(np.float32)
    trace = hiddenlens.record(system, x)
    t_ours, curve = best_of(lambda: hiddenlens.memory_curve(system, trace, max_lag=MAX_LAG))
    t_start = MAX_LAG
    X = trace.states[0, t_start:].astype(np.float64)  # (N, S)
    b_idx, t_idx = np.zeros(T - t_start, int), np.arange(t_start, T)
    lags = np.arange(MAX_LAG + 1)
    Y = trace.inputs[0][t_idx[:, None] - lags[None, :]].reshape(len(t_idx), -1)  # (N, (K+1) I)
    folds, _ = _folds(b_idx, t_idx, 1, t_start, T, 5, MAX_LAG)
    target = _Targets(trace.inputs.astype(np.float64), b_idx, t_idx)
    t_core, _ = best_of(lambda: _ridge_cv(X, target, MAX_LAG, folds, np.array(DEFAULT_ALPHAS)))

    def sklearn_folds():
        out = []
        for tr, te in folds:
            model = make_pipeline(StandardScaler(), RidgeCV(alphas=DEFAULT_ALPHAS,
                                                            alpha_per_target=True))
            model.fit(X[tr], Y[tr])
            r2 = r2_score(Y[te], model.predict(X[te]), multioutput="raw_values")
            out.append(r2.reshape(MAX_LAG + 1, I).mean(axis=1))
        return np.array(out)

    t_sk, fold_scores = best_of(sklearn_folds)
    diff = np.abs(fold_scores - curve.samples).max()
    print(f"\n-- against scikit-learn, 1 thread, 1 x {T} steps, same 5 time-block folds and "
          f"{len(DEFAULT_ALPHAS)} alphas:\n"
          f"memory_curve data mode (recording, curve and baseline) {t_ours:7.3f} s\n"
          f"its ridge core alone (all {MAX_LAG + 1} lags x {I} inputs)          {t_core:7.3f} s\n"
          f"scikit-learn StandardScaler + RidgeCV(alpha_per_target=True), multi-output, "
          f"per fold {t_sk:7.3f} s\n"
          f"max |R^2 difference| over folds and lags: {diff:.2e}")

if __name__ == "__main__":
    main()

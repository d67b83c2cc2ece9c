"""Time memory curves of a GRU with 256 states over 2000 steps, lags up to 100.

Prints seconds per call and the ratio to recording the same states, with 1 thread and with the
default number of threads (torch and the BLAS behind numpy). Run: python benchmarks/bench_memory.py
"""

from __future__ import annotations

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
          f"default torch.get_num_threads() = {default_threads}")
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
                t_mem, curve = best_of(
                    lambda kw=kw, inputs=inputs: hiddenlens.memory_curve(
                        system, inputs, max_lag=MAX_LAG, progress=False, **kw),
                    repeats=1 if kw["method"] == "sensitivity" else 3)
                # recording the same number of sequences and steps, for the ratio
                shape = (curve.metadata["n_sequences"], curve.metadata["n_steps"], I)
                x = rng.standard_normal(shape).astype(np.float32)
                t_rec, _ = best_of(lambda x=x: hiddenlens.record(system, x))
                print(f"{label:48s} {t_mem:7.3f} s   recording {shape[0]}x{shape[1]} steps "
                      f"{t_rec:7.4f} s   ratio {t_mem / t_rec:7.0f}   capacity "
                      f"{curve.capacity:6.2f}   span {curve.span}")
    torch.set_num_threads(default_threads)


if __name__ == "__main__":
    main()

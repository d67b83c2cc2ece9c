"""Benchmark: task_memory against the time of recording the states it decodes.

Targets: H=256, T=500, B=256, max_lag=100 within 20x the recording time; with the 100x100
cross-temporal matrix within 60x. Prints the ratios measured in this run and the load average.
``--quick`` runs a smaller case (H=64, T=200, B=128, max_lag=40) whose ratios are indicative only.
"""

from __future__ import annotations

import argparse
import os
import time

import numpy as np
import torch

import hiddenlens

H, T, B, I, MAX_LAG = 256, 500, 256, 4, 100


def _load() -> str:
    return "/".join(f"{v:.1f}" for v in os.getloadavg())  # 1, 5 and 15 min averages


def main() -> None:
    global H, T, B, MAX_LAG
    parser = argparse.ArgumentParser(description=__doc__.splitlines()[0])
    parser.add_argument("--quick", action="store_true", help="a smaller, indicative case")
    if parser.parse_args().quick:
        H, T, B, MAX_LAG = 64, 200, 128, 40
    gen = torch.Generator().manual_seed(0)
    gru = torch.nn.GRU(I, H, batch_first=True)
    with torch.no_grad():
        for p in gru.parameters():
            p.copy_(torch.randn(p.shape, generator=gen) / np.sqrt(H))
    rng = np.random.default_rng(0)
    cues = rng.integers(3, size=B)
    onsets = rng.integers(0, T - MAX_LAG - 1, size=B)
    x = 0.1 * rng.standard_normal((B, T, I)).astype(np.float32)
    x[np.arange(B), onsets, cues] += 2.0

    print(f"torch threads {torch.get_num_threads()}", flush=True)
    t0 = time.perf_counter()
    trace = hiddenlens.record(gru, x)
    t_record = time.perf_counter() - t0
    print(f"record H={H} T={T} B={B}: {t_record:.2f} s (load {_load()})", flush=True)

    t0 = time.perf_counter()
    r = hiddenlens.task_memory(trace, cues, onsets=onsets, max_lag=MAX_LAG, cross_temporal=False)
    t = time.perf_counter() - t0
    print(f"task_memory logistic, max_lag={MAX_LAG}: {t:.2f} s = {t / t_record:.1f}x recording "
          f"(target 20x); span {r.span} (load {_load()})", flush=True)

    t0 = time.perf_counter()
    r = hiddenlens.task_memory(trace, cues, onsets=onsets, max_lag=MAX_LAG)
    t = time.perf_counter() - t0
    print(f"task_memory logistic + cross-temporal {MAX_LAG + 1}x{MAX_LAG + 1}: {t:.2f} s = "
          f"{t / t_record:.1f}x recording (target 60x); span {r.span} (load {_load()})",
          flush=True)

    t0 = time.perf_counter()
    hiddenlens.task_memory(trace, cues.astype(float), onsets=onsets, max_lag=MAX_LAG)
    t = time.perf_counter() - t0
    print(f"task_memory ridge + cross-temporal: {t:.2f} s = {t / t_record:.1f}x recording "
          f"(load {_load()})", flush=True)

if __name__ == "__main__":
    main()

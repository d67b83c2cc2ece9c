"""Thread policy of the small-matrix loops: gradient flow and fixed points, one thread vs two.

Prints, beside ``os.getloadavg()``:

1. ``gradient_flow`` (GRU, H=64, T=400, B=4) with the library's policy (one torch thread for
   per-step work below 2e7 flops) and with torch's default threads forced;
2. ``find_fixed_points`` (GRU, H=128, default starts) the same way (one thread up to S = 512);
3. ``find_fixed_points`` on a 2-layer LSTM with H=256 (S = 1024) with the default sizing
   (32 starts, at most 50 iterations): seconds per iteration from a 3-iteration run, and the
   resulting bound on the whole default search.

    python benchmarks/bench_threads.py
"""

from __future__ import annotations

import os
import time

import torch
from torch import nn

import hiddenlens as hl
import hiddenlens._analyses.fixed_points as fixed_module
import hiddenlens._analyses.gradient_flow as flow_module

I = 16


def build(cls, H, T, B, seed=0, **kw):
    gen = torch.Generator().manual_seed(seed)
    with torch.random.fork_rng(devices=[]):
        model = cls(I, H, batch_first=True, **kw).eval()
    with torch.no_grad():
        for p in model.parameters():
            p.copy_((torch.rand(p.shape, generator=gen) * 2 - 1) / H**0.5)
    x = torch.randn(B, T, I, generator=gen)
    return model, hl.record(model, x)


def timed(fn, *args, **kw):
    start = time.perf_counter()
    fn(*args, **kw)
    return time.perf_counter() - start



def policy_and_forced(module, threshold, forced_value, fn, *args, **kw):
    """Seconds of ``fn`` with the library's thread policy, then with the module's one-thread
    ``threshold`` set to ``forced_value`` (torch's default threads throughout), restored after."""
    policy = timed(fn, *args, **kw)
    saved = getattr(module, threshold)
    setattr(module, threshold, forced_value)
    try:
        forced = timed(fn, *args, **kw)
    finally:
        setattr(module, threshold, saved)
    return policy, forced


def load() -> str:
    return "load {:.2f} {:.2f} {:.2f}".format(*os.getloadavg())


def main():
    print(f"torch {torch.__version__}, default threads {torch.get_num_threads()}, {load()}")
    model, trace = build(nn.GRU, 64, 400, 4)
    hl.gradient_flow(model, trace, progress=False)  # warm-up
    policy, forced = policy_and_forced(flow_module, "_SMALL_STEP_FLOPS", 0.0, hl.gradient_flow,
                                       model, trace, progress=False)
    print(f"gradient_flow GRU H=64: policy {policy:.2f} s, two threads {forced:.2f} s, "
          f"ratio {forced / policy:.2f} ({load()})")

    model, trace = build(nn.GRU, 128, 100, 8)
    policy, forced = policy_and_forced(fixed_module, "_ONE_THREAD_UP_TO", 0,
                                       hl.find_fixed_points, model, trace, progress=False)
    print(f"find_fixed_points GRU H=128 (256 starts): policy {policy:.2f} s, two threads "
          f"{forced:.2f} s, ratio {forced / policy:.2f} ({load()})")

    model, trace = build(nn.LSTM, 256, 20, 2, num_layers=2)
    S = 2 * 2 * 256
    n = max(16, 256 * 128 // S)
    t = timed(hl.find_fixed_points, model, trace, max_iter=3, progress=False)
    print(f"find_fixed_points 2-layer LSTM S={S}: {n} starts, 3 iterations in {t:.1f} s; "
          f"default search (<= 50 iterations) at most ~{t / 3 * 50:.0f} s ({load()})")


if __name__ == "__main__":
    main()

"""Top-k singular values of step Jacobians against torch.linalg.svdvals, and peak memory.

Part 1, speed at equal accuracy: the k=10 largest singular values of B*n step Jacobians
(B=8 sequences, n steps each) of untrained one-layer GRU/LSTM models, float64:

* svdvals: ``torch.linalg.svdvals`` of the materialised Jacobians, float64 and float32 (the
  baseline is the faster of the two; both meet the accuracy below);
* gram / krylov: the "gram" and "krylov" methods of ``hiddenlens.jacobian_spectra`` on the same
  Jacobians (krylov through the closed-form Jacobian-vector products, J never formed);
* end to end: ``jacobian_spectra(model, trace, k=10, method=...)`` including the Jacobians.

Accuracy: max relative error of the top k against float64 svdvals, target <= 1e-4.

Part 2, memory: ``jacobian_spectra`` of a GRU with H=512 over T=2000 steps, B=8 (16,000
Jacobians of 512 x 512, 31 GiB if all were held in float64) in a fresh subprocess; peak RSS from
``resource.getrusage`` (target < 2 GiB). It takes minutes; ``--rss-steps`` shortens it.

Runs once with 1 thread (torch, and BLAS through threadpoolctl) and once with the defaults.

    python benchmarks/bench_spectra.py [--rounds 3] [--rss-steps 2000] [--skip-rss]
"""

from __future__ import annotations

import argparse
import resource
import subprocess
import sys
import time

import numpy as np
import torch
from threadpoolctl import threadpool_limits
from torch import nn

import hiddenlens as hl
from hiddenlens._jacobians import linearize
from hiddenlens._spectra import _dense_top, top_singular_values

B, I, K = 8, 16, 10
CONFIGS = [(nn.GRU, 256, 4), (nn.LSTM, 256, 2), (nn.GRU, 512, 2), (nn.LSTM, 512, 1)]


def build(cls, H, T, seed=0):
    gen = torch.Generator().manual_seed(seed)
    with torch.random.fork_rng(devices=[]):
        model = cls(I, H, batch_first=True).eval()
    with torch.no_grad():
        for p in model.parameters():
            p.copy_((torch.rand(p.shape, generator=gen) * 2 - 1) / H**0.5)
    x = torch.randn(B, T, I, generator=gen)
    return model, hl.record(model, x)


def best(fn, rounds):
    out, times = None, []
    for _ in range(rounds):
        start = time.perf_counter()
        out = fn()
        times.append(time.perf_counter() - start)
    return min(times), out


def part1(rounds):
    for cls, H, n in CONFIGS:
        one_config(cls, H, n, rounds)


def one_config(cls, H, n, rounds):
    model, trace = build(cls, H, n)
    system = hl.wrap(model)
    S = system.state_size
    N = B * n
    J = torch.from_numpy(hl.jacobians(system, trace, dtype="float64")).reshape(N, S, S)
    prev = torch.from_numpy(trace.previous_states().reshape(N, S))
    x = torch.from_numpy(np.array(trace.inputs).reshape(N, I))
    lin = linearize(system, prev, x, dtype=torch.float64)
    ref = torch.linalg.svdvals(J)[:, :K]
    gen = torch.Generator().manual_seed(0)
    runs = {
        "svdvals f64": lambda: torch.linalg.svdvals(J)[:, :K],
        "svdvals f32": lambda: torch.linalg.svdvals(J.float())[:, :K].double(),
        "gram": lambda: _dense_top(J, K, "gram", 1e-4),
        "krylov": lambda: top_singular_values(lin, K, tol=1e-4, generator=gen),
    }
    _dense_top(J[:2], K, "gram", 1e-4)  # warm-up: scipy import, thread pools
    res = {}
    for name, fn in runs.items():
        t, sv = best(fn, rounds)
        res[name] = (t, float(((sv - ref).abs() / ref).max()))
    base = min(res["svdvals f64"][0], res["svdvals f32"][0])
    print(f"{cls.__name__} H={H} (S={S}), {N} Jacobians, k={K}:")
    for name, (t, err) in res.items():
        print(f"  {name:12s} {1e3 * t / N:8.2f} ms/Jacobian   speed-up {base / t:5.2f}x"
              f"   max rel. error {err:.1e}")
    e2e = {m: best(lambda m=m: hl.jacobian_spectra(system, trace, k=K, method=m, tol=1e-4,
                                                   progress=False), rounds)[0]
           for m in ("svd", "gram")}
    print(f"  end to end: jacobian_spectra svd {e2e['svd']:.2f} s, gram {e2e['gram']:.2f} s"
          f"   speed-up {e2e['svd'] / e2e['gram']:.2f}x")


def rss_child(steps):
    model, trace = build(nn.GRU, 512, steps)
    start = time.perf_counter()
    spec = hl.jacobian_spectra(model, trace, k=K, progress=False)
    elapsed = time.perf_counter() - start
    peak = resource.getrusage(resource.RUSAGE_SELF).ru_maxrss / 2**20  # KiB -> GiB
    print(f"RSS {peak:.3f} {elapsed:.1f} {spec.method}")


def part2(steps):
    cmd = [sys.executable, __file__, "--rss-child", str(steps)]
    out = subprocess.run(cmd, capture_output=True, text=True, check=True).stdout.split()
    peak, elapsed, method = float(out[1]), float(out[2]), out[3]
    full = B * steps * 512 * 512 * 8 / 2**30
    print(f"GRU H=512, T={steps}, B={B}, k={K} (method {method}): peak RSS {peak:.2f} GiB "
          f"(target < 2 GiB; all Jacobians at once would be {full:.1f} GiB), {elapsed:.0f} s")


def main():
    parser = argparse.ArgumentParser(description=__doc__.splitlines()[0])
    parser.add_argument("--rounds", type=int, default=3)
    parser.add_argument("--rss-steps", type=int, default=2000)
    parser.add_argument("--skip-rss", action="store_true")
    parser.add_argument("--rss-child", type=int, default=None, help=argparse.SUPPRESS)
    args = parser.parse_args()
    if args.rss_child is not None:
        rss_child(args.rss_child)
        return
    default = torch.get_num_threads()
    print(f"torch {torch.__version__}, default threads: {default}")
    for threads in sorted({1, default}):
        torch.set_num_threads(threads)
        print(f"\n== torch.get_num_threads() = {torch.get_num_threads()}"
              + (" (BLAS limited to 1 thread too)" if threads == 1 else ""))
        if threads == 1:
            with threadpool_limits(limits=1):
                part1(args.rounds)
        else:
            part1(args.rounds)
    torch.set_num_threads(default)
    if not args.skip_rss:
        print("\n== peak memory (fresh process, default threads)")
        part2(args.rss_steps)


if __name__ == "__main__":
    main()

"""Jacobian spectra against the two-liner ``jacobians`` + ``numpy.linalg.svd``, in one run.

Prints, beside ``os.getloadavg()`` before each part:

1. For S = 16 ... 1024 (one-layer GRU with H = S, B = 1, n steps): seconds of the two-liner
   ``np.linalg.svd(hl.jacobians(model, trace, dtype="float64"), compute_uv=False)`` at its best
   thread setting (numpy's default threads and one BLAS thread through threadpoolctl, the
   faster of the two; threadpoolctl is used here only, never in the library), and the ratio
   two-liner / ``jacobian_spectra`` with default options (all S values), with k = S/8 and
   with k = 8 (targets: >= 1 for the default, >= 3 for k <= S/8), with the largest relative
   error of the reported values against the SVD (target <= 1e-3).
2. The exact spectral radius (``radius=True``): its extra cost over the default run, as a
   ratio to one batched ``torch.linalg.eigvals`` call on the same Jacobians (target <= 1).
3. Streaming: B = 1, H = 64, k = 8 at T = 1000 and T = 200000 (quick: 16000), milliseconds per
   step and their ratio (target <= 1.5), total seconds at the long T (target < 60 s).
4. The widget's spectra tab for a GRU with H = 128, T = 500, B = 8: seconds from ``explore`` to
   its first figure (recording, compute and draw of the first pass; target <= 1.5 s), and to
   the figure of all sequences.
5. Thread policy: ``jacobian_spectra`` at S = 64 and S = 1024 with the library's policy
   (independent chunks on one worker thread per core, one torch thread each), with one worker
   (``threads=1``), and as one call at torch's default threads.

    python benchmarks/bench_spectra.py [--quick]     # --quick: under a minute
"""

from __future__ import annotations

import argparse
import os
import time

import numpy as np
import torch
from threadpoolctl import threadpool_limits
from torch import nn

import hiddenlens as hl
import hiddenlens._analyses.spectra as spectra_module
from hiddenlens._core.threads import single_thread

I = 16
FULL_SIZES = {16: 2000, 32: 2000, 64: 2000, 128: 1000, 256: 128, 512: 24, 1024: 4}
QUICK_SIZES = {16: 1000, 64: 1000, 128: 200, 256: 32, 1024: 2}


def build(H: int, T: int, B: int = 1, seed: int = 0):
    """A GRU with torch's own init range drawn from a local generator, and its trace."""
    gen = torch.Generator().manual_seed(seed)
    with torch.random.fork_rng(devices=[]):
        model = nn.GRU(I, H, batch_first=True).eval()
    with torch.no_grad():
        for p in model.parameters():
            p.copy_((torch.rand(p.shape, generator=gen) * 2 - 1) / H**0.5)
    x = torch.randn(B, T, I, generator=gen)
    return model, x, hl.record(model, x)


def best(rounds: int, fn, *args, **kw):
    out, times = None, []
    for _ in range(rounds):
        start = time.perf_counter()
        out = fn(*args, **kw)
        times.append(time.perf_counter() - start)
    return min(times), out


def load() -> str:
    return "load {:.2f} {:.2f} {:.2f}".format(*os.getloadavg())


def two_liner(model, trace):
    return np.linalg.svd(hl.jacobians(model, trace, dtype="float64"), compute_uv=False)


def part_sizes(sizes, rounds):
    print(f"\n== 1. jacobian_spectra vs jacobians + numpy.linalg.svd ({load()})")
    print("   S      n | two-liner s (threads) | default  ratio err    | k=S/8  ratio err    "
          "| k=8   ratio err")
    for S, n in sizes.items():
        model, _, trace = build(S, n)
        t_def, ref = best(rounds, two_liner, model, trace)
        with threadpool_limits(limits=1):
            t_one, _ = best(rounds, two_liner, model, trace)
        base, which = min((t_def, "default"), (t_one, "1"))
        row = f"{S:5d} {n:6d} | {base:9.3f} ({which:>7s})   "
        for k in (None, max(1, S // 8), 8):
            t, res = best(rounds, hl.jacobian_spectra, model, trace, k=k, progress=False)
            err = float(np.max(np.abs(res.singular_values - ref[..., :res.k])
                               / ref[..., :res.k]))
            row += f"| {t:6.3f} {base / t:5.2f}x {err:.0e} "
        print(row + f"| {load()}", flush=True)


def part_radius(rounds):
    print(f"\n== 2. exact spectral radius vs one batched eigvals call ({load()})")
    for S, n in ((64, 1000), (128, 250)):
        model, _, trace = build(S, n)
        J = torch.from_numpy(hl.jacobians(model, trace, dtype="float64")).reshape(-1, S, S)
        with single_thread():
            t_eig, _ = best(rounds, torch.linalg.eigvals, J)
        t0, _ = best(rounds, hl.jacobian_spectra, model, trace, progress=False)
        t1, _ = best(rounds, hl.jacobian_spectra, model, trace, radius=True, progress=False)
        print(f"   S={S:4d}, {n} steps: radius adds {t1 - t0:.3f} s, one torch eigvals call "
              f"{t_eig:.3f} s: ratio {(t1 - t0) / t_eig:.2f} (target <= 1); the default's free "
              "bounds cost nothing extra")


def part_stream(long_T):
    print(f"\n== 3. streaming, B=1, H=64, k=8 ({load()})")

    def per_step(T, show=False):
        model, _, trace = build(64, T)
        start = time.perf_counter()
        hl.jacobian_spectra(model, trace, k=8, progress=show)
        total = time.perf_counter() - start
        print(f"   T={T:7d}: {total:7.2f} s, {1e3 * total / T:.3f} ms per step ({load()})",
              flush=True)
        return total / T

    # the short run before and after the long one: the load of a shared machine drifts
    before = per_step(1000)
    long = per_step(long_T, show=True)
    after = per_step(1000)
    print(f"   per-step ratio T={long_T} / T=1000: {long / before:.2f} (before), "
          f"{long / after:.2f} (after) (target <= 1.5); T={long_T} in {long * long_T:.1f} s "
          "(target < 60 s)")


def part_widget():
    from hiddenlens.widgets import explore

    print(f"\n== 4. widget spectra tab, GRU H=128, T=500, B=8 ({load()})")
    model, x, _ = build(128, 500, B=8, seed=1)
    explore(model, x[:, :5], analyses=["spectra"], background=False)  # imports, first draw
    start = time.perf_counter()
    view = explore(model, x, analyses=["spectra"], background=True)
    panel = view._panels["spectra"]
    while not view.images["spectra"]:
        time.sleep(0.005)
    shown = time.perf_counter() - start
    first = "spectra" not in view.computed  # drawn before all sequences were computed
    while "spectra" not in view.computed or "First pass" in panel.message.value:
        time.sleep(0.005)  # the first pass's note goes when all sequences are drawn
    whole = time.perf_counter() - start
    view.close()
    print(f"   explore(...) to the first figure: {shown:.2f} s (target <= 1.5 s; "
          f"{'a first pass on fewer sequences' if first else 'all sequences'}), to the figure "
          f"of all sequences {whole:.2f} s ({load()})")


def part_threads(rounds):
    print(f"\n== 5. thread policy ({load()}); torch default threads: {torch.get_num_threads()}")
    for S, n, k in ((64, 1000, 8), (1024, 4, 128)):
        model, _, trace = build(S, n)
        times = {}
        times["policy"], _ = best(rounds, hl.jacobian_spectra, model, trace, k=k,
                                  progress=False)
        times["one worker"], _ = best(rounds, hl.jacobian_spectra, model, trace, k=k,
                                      progress=False, threads=1)
        spectra_module._THREADS_FROM_STATE = 0  # one call, torch's default threads
        try:
            times["default threads"], _ = best(rounds, hl.jacobian_spectra, model, trace, k=k,
                                               progress=False)
        finally:
            spectra_module._THREADS_FROM_STATE = 2048
        p = times["policy"]
        print(f"   S={S:4d}, k={k}: policy {p:.3f} s, one worker {times['one worker']:.3f} s "
              f"({times['one worker'] / p:.2f}x), default threads {times['default threads']:.3f}"
              f" s ({times['default threads'] / p:.2f}x) ({load()})")


def main():
    parser = argparse.ArgumentParser(description=__doc__.splitlines()[0])
    parser.add_argument("--quick", action="store_true", help="smaller sizes, under a minute")
    parser.add_argument("--rounds", type=int, default=None)
    args = parser.parse_args()
    rounds = args.rounds or (1 if args.quick else 2)
    print(f"torch {torch.__version__}, numpy {np.__version__}, torch threads "
          f"{torch.get_num_threads()}, {load()}")
    hl.jacobian_spectra(*build(16, 4)[::2], progress=False)  # warm-up: imports, kernels
    part_sizes(QUICK_SIZES if args.quick else FULL_SIZES, rounds)
    part_radius(rounds)
    part_stream(16000 if args.quick else 200000)
    part_widget()
    part_threads(rounds)


if __name__ == "__main__":
    main()

"""Time the fixed-point search on a GRU with 128 units from 256 starts.

Prints the wall time of ``find_fixed_points`` and its ratio to one step of the system over the
256 starts, to one batch of step Jacobians at the starts, and to recording the trace the starts
come from (a T-step forward pass); once with one thread and once with torch's default. A second,
harder case (recurrent weights scaled by 4: several saddles, slow valleys) is timed as well.

A last part times the search at S = 1024 (a 2-layer LSTM with H = 256: h and c of both layers)
with the default sizing (starts and iterations scale with S): three iterations, and the bound
they give on the whole default search, as the progress bar's "left" estimate does; ``--full``
runs the whole default search as well.

Run: python benchmarks/bench_fixed_points.py [--full]
"""

from __future__ import annotations

import argparse
import os
import time

import torch
from torch import nn

import hiddenlens as hl
from hiddenlens._analyses.fixed_points import _working_system
from hiddenlens._core.jacobians import step_jacobians

H, I, N_STARTS = 128, 16, 256
B, T = 64, 200
GAIN = 2.0  # recurrent weights scaled up from PyTorch's init, so the dynamics are not trivial
HARD_GAIN = 4.0


def make_gru(seed: int = 0, gain: float = GAIN) -> nn.GRU:
    gen = torch.Generator().manual_seed(seed)
    gru = nn.GRU(I, H, batch_first=True)
    bound = H**-0.5
    with torch.no_grad():  # PyTorch's own init range, drawn from a local generator
        for name, p in gru.named_parameters():
            p.copy_((torch.rand(p.shape, generator=gen) * 2 - 1) * bound)
            if name.startswith("weight_hh"):
                p.mul_(gain)
    return gru


def best_of(fn, repeat: int = 5) -> float:
    times = []
    for _ in range(repeat):
        t0 = time.perf_counter()
        fn()
        times.append(time.perf_counter() - t0)
    return min(times)


def run(threads: int | None) -> None:
    default = torch.get_num_threads()
    torch.set_num_threads(threads or default)
    print(f"\n== torch.get_num_threads() = {torch.get_num_threads()}")
    gru = make_gru()
    gen = torch.Generator().manual_seed(1)
    inputs = torch.randn(B, T, I, generator=gen)
    t_record = best_of(lambda: hl.record(gru, inputs), repeat=3)
    trace = hl.record(gru, inputs)
    system = hl.wrap(gru)
    work, _ = _working_system(system, None)  # the float64 copy the search runs on
    s = torch.tensor(trace.states.reshape(-1, H)[:N_STARTS], dtype=torch.float64)
    x = torch.zeros(N_STARTS, I, dtype=torch.float64)
    with torch.no_grad():
        t_step = best_of(lambda: work.step(s, x), repeat=20)
    t_jac = best_of(lambda: step_jacobians(work, s, x), repeat=3)

    hl.find_fixed_points(gru, trace, n_starts=8, progress=False)  # warm-up (imports, dispatch)
    t0 = time.perf_counter()
    fp = hl.find_fixed_points(gru, trace, n_starts=N_STARTS, progress=False)
    t_find = time.perf_counter() - t0

    print(f"GRU H={H}, I={I}; {N_STARTS} starts from a trace of B={B}, T={T}; float64 search")
    print(f"  result: {fp}")
    print(f"  largest q among points: {fp.q.max():.2e} (tol {fp.tol:.0e}); "
          f"largest q from any start: {fp.final_q.max():.2e}")
    print(f"  find_fixed_points:             {t_find:8.3f} s")
    print(f"  one step over the starts:      {1e3 * t_step:8.3f} ms   ratio {t_find / t_step:10.0f}")
    print(f"  step Jacobians at the starts:  {1e3 * t_jac:8.1f} ms   ratio {t_find / t_jac:10.1f}")
    print(f"  recording the trace ({T} steps): {1e3 * t_record:7.1f} ms   "
          f"ratio {t_find / t_record:10.1f}")

    hard = make_gru(gain=HARD_GAIN)
    trace = hl.record(hard, inputs)
    t0 = time.perf_counter()
    fp = hl.find_fixed_points(hard, trace, n_starts=N_STARTS, progress=False)
    t_hard = time.perf_counter() - t0
    print(f"harder case, recurrent weights x{HARD_GAIN:g}: {t_hard:.3f} s "
          f"(ratio to one step {t_hard / t_step:.0f})")
    print(f"  result: {fp}")
    torch.set_num_threads(default)


def load() -> str:
    return "load {:.2f} {:.2f} {:.2f}".format(*os.getloadavg())


def run_large(full: bool) -> None:
    gen = torch.Generator().manual_seed(2)
    with torch.random.fork_rng(devices=[]):
        lstm = nn.LSTM(I, 256, num_layers=2, batch_first=True)
    with torch.no_grad():  # PyTorch's own init range, drawn from a local generator
        for p in lstm.parameters():
            p.copy_((torch.rand(p.shape, generator=gen) * 2 - 1) / 16.0)
    trace = hl.record(lstm, torch.randn(2, 20, I, generator=gen))
    S = trace.state_size
    n_starts = max(16, 256 * 128 // S)
    max_iter = 100 if S < 512 else 50
    print(f"\n== S={S} (2-layer LSTM, H=256), default sizing: {n_starts} starts, at most "
          f"{max_iter} iterations ({load()})")
    t0 = time.perf_counter()
    hl.find_fixed_points(lstm, trace, max_iter=3, progress=False)
    t3 = time.perf_counter() - t0
    print(f"  3 iterations: {t3:.1f} s; the default search takes at most ~{t3 / 3 * max_iter:.0f} s "
          f"(starts that finish leave the batch) ({load()})")
    if full:
        t0 = time.perf_counter()
        fp = hl.find_fixed_points(lstm, trace, progress=True)
        print(f"  whole default search: {time.perf_counter() - t0:.1f} s; {fp} ({load()})")


if __name__ == "__main__":
    parser = argparse.ArgumentParser(description=__doc__.splitlines()[0])
    parser.add_argument("--full", action="store_true", help="run the whole search at S = 1024")
    args = parser.parse_args()
    print(load())
    run(1)
    run(None)
    run_large(args.full)

"""Per-step Jacobians: closed forms against autograd loops, vmap(jacrev) and the write floor.

GRU and LSTM (one layer), H=256, I=16, T=200, B=8, float32 on the CPU: all B*T step Jacobians
J_t = d s_t / d s_{t-1} (S=256 for the GRU, S=512 for the LSTM, whose state holds h and c).

* closed form: ``hiddenlens.jacobians(model, trace)`` (result written into a fresh array);
* vmap(jacrev): ``torch.func.vmap(torch.func.jacrev(step))`` over all states, in chunks;
* naive: one ``torch.autograd.functional.jacobian`` call per (sample, step). Too slow to run
  B*T times, so a few calls are timed and the per-call time is multiplied by B*T (printed as
  extrapolated);
* floor: allocating and filling a B*T*S*S float32 array, the least any method that returns the
  Jacobians must spend: the faster of ``torch.empty(...).fill_`` and ``np.empty(...).fill``
  (numpy asks for transparent huge pages, which is faster when the kernel has them to give and
  much slower when it must compact memory first).

A leaky (continuous-time) RNN of the same size, ``hiddenlens.leaky_rnn``, is timed too: its closed
form against the autograd route hiddenlens takes for the same step wrapped as a plain step
function (``vmap(jacrev)`` inside ``hiddenlens.jacobians``). Target: closed form >= 3x.

Targets: closed form >= 100x faster than naive, >= 5x faster than vmap(jacrev), <= 3x the floor.
Figures are the best of the rounds, with the candidates interleaved so that they share the
machine load (on a shared machine the best run is the least disturbed one).
Runs once with 1 thread and once with torch's default thread count.

    python benchmarks/bench_jacobians.py [--rounds 3]
"""

from __future__ import annotations

import argparse
import os
import time

import numpy as np
import torch
from torch import nn
from torch.func import jacrev, vmap

import hiddenlens as hl

H, T = 256, 200
B, I = 8, 16
NAIVE_CALLS = 3
TARGETS = {"naive": 100.0, "vmap": 5.0, "floor": 3.0}


def build(cls, seed: int = 0):
    """A seeded model of class ``cls`` (torch's init range, from a local generator) and its
    trace on seeded inputs."""
    gen = torch.Generator().manual_seed(seed)
    with torch.random.fork_rng(devices=[]):
        model = cls(I, H, batch_first=True).eval()
    with torch.no_grad():
        for p in model.parameters():
            p.copy_((torch.rand(p.shape, generator=gen) * 2 - 1) / H**0.5)
    x = torch.randn(B, T, I, generator=gen)
    return model, hl.record(model, x)


def timed(fn):
    start = time.perf_counter()
    out = fn()
    elapsed = time.perf_counter() - start
    del out
    return elapsed


def run(cls, rounds):
    model, trace = build(cls)
    system = hl.wrap(model)
    S = system.state_size
    N = B * T
    prev = torch.from_numpy(trace.previous_states().reshape(N, S))
    x = torch.from_numpy(np.array(trace.inputs).reshape(N, I))

    def per_sample(s, u):
        return system.step(s.unsqueeze(0), u.unsqueeze(0)).squeeze(0)

    def closed():
        return hl.jacobians(system, trace)

    def vmapped():
        out = torch.empty(N, S, S)
        step = max(1, (1 << 24) // (S * S))
        for a in range(0, N, step):
            out[a:a + step] = vmap(jacrev(per_sample))(prev[a:a + step], x[a:a + step])
        return out

    def floor_torch():
        return torch.empty(N, S, S).fill_(1.0)

    def floor_numpy():
        out = np.empty((N, S, S), dtype=np.float32)
        out.fill(1.0)
        return out

    def naive_calls():
        for n in range(NAIVE_CALLS):
            torch.autograd.functional.jacobian(lambda s, n=n: per_sample(s, x[n]), prev[n])

    check = hl.jacobians(system, trace.select(steps=slice(0, 2)))
    ref = vmap(jacrev(per_sample))(prev.view(B, T, S)[:, :2].reshape(-1, S),
                                   x.view(B, T, I)[:, :2].reshape(-1, I))
    err = float(np.abs(check.reshape(-1, S, S) - ref.numpy()).max())

    cands = {"closed": closed, "vmap": vmapped, "floor_torch": floor_torch,
             "floor_numpy": floor_numpy, "naive": naive_calls}
    for fn in cands.values():
        timed(fn)  # warm-up
    times = {k: [] for k in cands}
    for _ in range(rounds):
        for k, fn in cands.items():
            times[k].append(timed(fn))
    med = {k: min(v) for k, v in times.items()}
    med["naive"] *= N / NAIVE_CALLS  # extrapolated to all B*T states
    med["floor"] = min(med["floor_torch"], med["floor_numpy"])
    return S, med, err


def run_leaky(rounds):
    """Closed form against the autograd route for one leaky RNN, and their max difference."""
    gen = torch.Generator().manual_seed(0)
    W = torch.randn(H, H, generator=gen) * (1.5 / H ** 0.5)
    U = torch.randn(H, I, generator=gen) / I ** 0.5
    alpha = torch.rand(H, generator=gen) * 0.4 + 0.05
    system = hl.leaky_rnn(W, U, torch.zeros(H), alpha=alpha, dt=0.01)
    as_fn = hl.wrap(system.step, state_size=H, input_size=I)  # same map, no closed form
    trace = hl.record(system, torch.randn(B, T, I, generator=gen))
    err = float(np.abs(hl.jacobians(system, trace.select(steps=slice(0, 4)))
                       - hl.jacobians(as_fn, trace.select(steps=slice(0, 4)))).max())
    cands = {"closed": lambda: hl.jacobians(system, trace),
             "autograd": lambda: hl.jacobians(as_fn, trace)}
    for fn in cands.values():
        timed(fn)
    times = {k: [] for k in cands}
    for _ in range(rounds):
        for k, fn in cands.items():
            times[k].append(timed(fn))
    return {k: min(v) for k, v in times.items()}, err


def main():
    parser = argparse.ArgumentParser(description=__doc__.splitlines()[0])
    parser.add_argument("--rounds", type=int, default=3)
    parser.add_argument("--leaky-only", action="store_true",
                        help="time only the leaky RNN (closed form vs autograd route)")
    args = parser.parse_args()
    default = torch.get_num_threads()
    print(f"torch {torch.__version__}, default threads: {default}, "
          f"load average {os.getloadavg()[0]:.2f}")
    for threads in sorted({1, default}):
        torch.set_num_threads(threads)
        med, err = run_leaky(args.rounds)
        print(f"leaky RNN H={H}, B={B}, T={T}, threads={threads}: closed {med['closed']:.3f} s, "
              f"autograd route {med['autograd']:.3f} s, ratio "
              f"{med['autograd'] / med['closed']:.1f}x (target >= 3x); max |diff| = {err:.1e}")
    torch.set_num_threads(default)
    if args.leaky_only:
        return
    print(f"step Jacobians of all B*T states, B={B}, T={T}, H={H}, I={I}, float32")
    for threads in sorted({1, default}):
        torch.set_num_threads(threads)
        print(f"\n== torch.get_num_threads() = {torch.get_num_threads()}")
        for cls in (nn.GRU, nn.LSTM):
            S, med, err = run(cls, args.rounds)
            gib = B * T * S * S * 4 / 2**30
            print(f"{cls.__name__} (S={S}, result {gib:.2f} GiB; max |closed - jacrev| on 2 "
                  f"steps = {err:.1e})")
            print(f"  closed form        {med['closed']:9.3f} s")
            print(f"  vmap(jacrev)       {med['vmap']:9.3f} s   ratio {med['vmap'] / med['closed']:7.1f}x"
                  f"  (target >= {TARGETS['vmap']:.0f}x)")
            print(f"  naive per step     {med['naive']:9.1f} s   ratio {med['naive'] / med['closed']:7.0f}x"
                  f"  (target >= {TARGETS['naive']:.0f}x; extrapolated from {NAIVE_CALLS} calls)")
            print(f"  write floor        {med['floor']:9.3f} s   closed / floor "
                  f"{med['closed'] / med['floor']:5.2f}x  (target <= {TARGETS['floor']:.0f}x; "
                  f"torch {med['floor_torch']:.3f} s, numpy {med['floor_numpy']:.3f} s)")
    torch.set_num_threads(default)


if __name__ == "__main__":
    main()

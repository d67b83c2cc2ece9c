"""Speed of hiddenlens.lyapunov_spectrum, measured in one run.

1. All exponents of a GRU with H=256 over T=1000 steps: seconds, the ratio to the plain forward
   pass, and the ratio to the QR + matrix-product flop count at this machine's measured GEMM rate.
2. Explicit-Jacobian QR against JVP QR over (S, k), for a GRU (closed-form Jacobians) and for a
   step function (autograd Jacobians): where each wins, and what method="auto" picks.

Run: python benchmarks/bench_lyapunov.py [--quick]
"""

from __future__ import annotations

import argparse
import os
import time

import torch
from torch import nn

import hiddenlens as hl
from hiddenlens._analyses.lyapunov import _choose_method, lyapunov_spectrum


def best_of(fn, repeats: int = 3) -> float:
    best = float("inf")
    for _ in range(repeats):
        t0 = time.perf_counter()
        fn()
        best = min(best, time.perf_counter() - t0)
    return best


def gemm_rate(n: int = 1024, dtype=torch.float32) -> float:
    """Flops per second of one n x n float32 GEMM (best of several)."""
    g = torch.Generator().manual_seed(0)
    a = torch.randn(n, n, generator=g, dtype=dtype)
    b = torch.randn(n, n, generator=g, dtype=dtype)
    a @ b
    t = best_of(lambda: a @ b, 7)
    return 2 * n**3 / t


def frame_flops(S: int, k: int, qr_every: int = 1) -> float:
    """Flops per step and sample: J @ Q, plus Householder QR of the (S, k) frame and forming Q
    (2 S k^2 - 2 k^3 / 3 each; Golub & Van Loan, Matrix Computations, 4th ed., sec. 5.2) once
    every ``qr_every`` steps."""
    return 2 * S * S * k + 2 * (2 * S * k * k - 2 * k**3 / 3) / qr_every


def gru(H: int, I: int = 8) -> nn.GRU:
    with torch.random.fork_rng(devices=[]):
        torch.manual_seed(0)
        return nn.GRU(I, H, batch_first=True)


def tanh_step_function(S: int, I: int = 8):
    g = torch.Generator().manual_seed(1)
    W = torch.randn(S, S, generator=g) * (1.5 / S**0.5)
    U = torch.randn(S, I, generator=g)

    def step(s, x):
        return torch.tanh(s @ W.T + x @ U.T)

    return hl.wrap(step, state_size=S, input_size=I, name=f"tanh{S}")


def inputs(B: int, T: int, I: int = 8) -> torch.Tensor:
    return torch.randn(B, T, I, generator=torch.Generator().manual_seed(2))


def section_gru_all(rate: float, quick: bool) -> None:
    H, T, B = 256, (300 if quick else 1000), 1
    model = gru(H)
    x = inputs(B, T)
    system = hl.wrap(model)
    trace = hl.record(system, x)  # the exponents are taken along the recorded trajectory
    with torch.no_grad():
        t_fwd = best_of(lambda: model(x), 5)
    t_lyap = best_of(lambda: lyapunov_spectrum(system, trace, warmup=0, progress=False), 3)
    res = lyapunov_spectrum(system, trace, warmup=0, progress=False)
    flops = T * B * frame_flops(H, H)
    ideal = flops / rate
    # where the time goes: the same QR and product on random frames, without Jacobians
    g = torch.Generator().manual_seed(3)
    J = torch.randn(B, H, H, generator=g) / H**0.5
    Q = torch.linalg.qr(torch.randn(B, H, H, generator=g)).Q

    def qr_loop():
        q = Q
        for _ in range(T):
            q = torch.linalg.qr(J @ q).Q

    t_qr = best_of(qr_loop, 2)
    A = J @ Q
    t_one_qr = best_of(lambda: torch.linalg.qr(A), 5)
    t_one_mm = best_of(lambda: J @ Q, 5)
    qr_rate = 2 * (2 * H**3 - 2 * H**3 / 3) / t_one_qr
    mm_rate = 2 * H**3 / t_one_mm
    print(f"  GRU H={H}, T={T}, B={B}, all {H} exponents (method={res.method}, "
          f"float32):")
    print(f"    lyapunov_spectrum   {t_lyap:8.3f} s   ({t_lyap / t_fwd:7.0f}x the forward pass "
          f"of {t_fwd * 1e3:.1f} ms)")
    print(f"    QR + J@Q alone      {t_qr:8.3f} s   ({t_qr / t_lyap:5.0%} of the total)")
    print(f"    flop floor          {ideal:8.3f} s   ({flops / 1e9:.1f} Gflop at "
          f"{rate / 1e9:.0f} Gflop/s)  ->  measured / floor = {t_lyap / ideal:.2f}x "
          "(target <= 3x)")
    print(f"    one {H}x{H} QR runs at {qr_rate / 1e9:.0f} Gflop/s (LAPACK Householder), one "
          f"J@Q at {mm_rate / 1e9:.0f} Gflop/s: the QR's own speed bounds the ratio at about "
          f"{(t_one_qr + t_one_mm) * T / ideal:.2f}x")
    for every in (2, 4):
        t = best_of(lambda e=every: lyapunov_spectrum(system, trace, warmup=0, qr_every=e,
                                                      progress=False), 1)
        r = lyapunov_spectrum(system, trace, warmup=0, qr_every=every, progress=False)
        diff = abs(r.exponents - res.exponents).max()
        floor = T * B * frame_flops(H, H, every) / rate
        print(f"    qr_every={every}          {t:8.3f} s   (max change of an exponent "
              f"{diff:.1e} per step; measured / its floor = {t / floor:.2f}x)")


def section_crossover(quick: bool) -> None:
    sizes = (64, 256, 1024) if quick else (64, 256, 512, 1024)
    print("  per-step milliseconds (B=1, float32); * marks the faster; auto's pick last")
    print(f"  {'system':<12} {'S':>5} {'k':>5} {'jacobian':>10} {'jvp':>10}  auto")
    agree = total = 0
    for family in ("GRU", "step fn"):
        for S in sizes:
            system = hl.wrap(gru(S)) if family == "GRU" else tanh_step_function(S)
            for k in sorted({1, 8, 32, S}):
                if k > S:
                    continue
                T = int(min(400, max(10, 2e8 / (S * S * max(k, 16)))))
                if quick:
                    T = max(10, T // 4)
                trace = hl.record(system, inputs(1, T))
                times = {}
                for method in ("jacobian", "jvp"):
                    lyapunov_spectrum(system, trace.select(steps=slice(0, 3)), k=k,
                                      method=method, warmup=0)
                    t = best_of(lambda s=system, tr=trace, k=k, m=method: lyapunov_spectrum(
                        s, tr, k=k, method=m, warmup=0, progress=False), 2)
                    times[method] = t / T * 1e3
                fast = min(times, key=times.get)
                pick = _choose_method(system, k)
                total += 1
                agree += pick == fast or abs(times["jacobian"] - times["jvp"]) < 0.1 * min(
                    times.values())
                marks = {m: ("*" if m == fast else " ") for m in times}
                print(f"  {family:<12} {S:>5} {k:>5} {times['jacobian']:9.3f}{marks['jacobian']}"
                      f" {times['jvp']:9.3f}{marks['jvp']}  {pick}")
    print(f"  auto picked the faster route (or one within 10%) in {agree} of {total} cases")


def main() -> None:
    parser = argparse.ArgumentParser(description=__doc__.splitlines()[0])
    parser.add_argument("--quick", action="store_true", help="smaller sizes, for a smoke run")
    args = parser.parse_args()
    default = torch.get_num_threads()
    print(f"torch {torch.__version__}, torch.get_num_threads() = {default}, "
          f"load average {os.getloadavg()[0]:.1f} on {os.cpu_count()} cores "
          "(times are best of several runs; a loaded machine inflates them)")
    for threads in sorted({1, default}):
        torch.set_num_threads(threads)
        print(f"\n=== {threads} thread(s) ===")
        rate = max(gemm_rate(), gemm_rate(512))
        print(f"  GEMM float32 (best of 1024x1024 and 512x512): {rate / 1e9:.1f} Gflop/s")
        section_gru_all(rate, args.quick)
        section_crossover(args.quick)
    torch.set_num_threads(default)


if __name__ == "__main__":
    main()

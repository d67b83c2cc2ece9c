"""Cost of ``hiddenlens.record`` against the module's own forward pass.

2-layer GRU and LSTM, H=256, I=32, T=500, B=16, float32 on the CPU. Each round times the plain
forward (under no_grad) and ``record`` back to back, so both see the same machine load; the
figures are medians over the rounds and the ratio is the median of the per-round ratios.
Runs once with 1 thread and once with torch's default thread count.

Targets: GRU <= 1.5x, LSTM <= 2.5x (the fused LSTM kernel returns only c_T, so the cell states
are rebuilt). Also printed: what record spends besides the fused kernels (wrapping, the NaN check,
the numpy conversion) and the LSTM cell-state rebuild against two alternatives.

    python benchmarks/bench_record.py [--rounds 9]
"""

from __future__ import annotations

import argparse
import statistics
import time

import numpy as np
import torch
from torch import nn

import hiddenlens as hl
from hiddenlens._core import record as _record
from hiddenlens._core import systems as _systems
from hiddenlens._core.trace import Trace

H, I, T, B, LAYERS = 256, 32, 500, 16, 2
TARGETS = {"GRU": 1.5, "LSTM": 2.5}


def build(cls):
    gen = torch.Generator().manual_seed(0)
    with torch.random.fork_rng(devices=[]):
        model = cls(I, H, LAYERS, batch_first=True).eval()
    with torch.no_grad():
        for p in model.parameters():
            p.copy_((torch.rand(p.shape, generator=gen) * 2 - 1) / H**0.5)
    x = torch.randn(B, T, I, generator=gen)
    return model, x


def timed(fn):
    start = time.perf_counter()
    fn()
    return time.perf_counter() - start


def median_ms(fn, rounds):
    fn()
    return 1e3 * statistics.median(timed(fn) for _ in range(rounds))


def compare(named, rounds):
    """Interleaved rounds of several callables; medians (ms) and per-round ratios to the first."""
    for fn in named.values():
        fn()  # warm-up
    times = {k: [] for k in named}
    for _ in range(rounds):
        for k, fn in named.items():
            times[k].append(timed(fn))
    first = next(iter(named))
    med = {k: 1e3 * statistics.median(v) for k, v in times.items()}
    ratio = {k: statistics.median(a / b for a, b in zip(v, times[first], strict=True))
             for k, v in times.items()}
    return med, ratio


# ---------------------------------------------------------------------- LSTM rebuild variants
def cells_full_sequence(layer, x, h_first, h_seq, c0, out):
    """The same rebuild in one block over the whole sequence (no cache blocking)."""
    old = _systems._LSTM_BLOCK
    _systems._LSTM_BLOCK = x.shape[0]
    try:
        _systems._lstm_cells(layer, x, h_first, h_seq, c0, out)
    finally:
        _systems._LSTM_BLOCK = old


def cells_scan(layer, x, h_first, h_seq, c0, out):
    """Gates as in the library, then a log-depth (Hillis-Steele) scan for c_t = f c_{t-1} + u."""
    Hh = layer.hidden_size
    h_prev = torch.cat([h_first[None], h_seq[:-1]])  # (T, B, H)
    r = slice(0, 3 * Hh)
    g = torch.nn.functional.linear(x, layer.w_ih[r], layer.b_ih[r] + layer.b_hh[r])
    g += torch.nn.functional.linear(h_prev, layer.w_hh[r])  # (T, B, 3H)
    g[..., :2 * Hh].sigmoid_()
    g[..., 2 * Hh:].tanh_()
    a = g[..., Hh:2 * Hh].clone()  # f_t
    u = g[..., :Hh] * g[..., 2 * Hh:]  # i_t * g_t
    u[0].addcmul_(a[0], c0)
    d = 1
    while d < a.shape[0]:  # after the pass with offset d, u[t] sums 2d steps back
        u[d:] = torch.addcmul(u[d:], a[d:], u[:-d])
        a[d:] = a[d:] * a[:-d]
        d *= 2
    out.copy_(u)


def rebuild_variants(model, x, rounds):
    system = hl.wrap(model)
    layer = system.layers[0]
    xt = x.transpose(0, 1).contiguous()  # (T, B, I)
    h0 = torch.zeros(1, B, H)
    c0 = torch.zeros(B, H)
    seq, _, _ = torch._VF.lstm(xt, (h0, c0[None]), layer.params, True, 1, 0.0, False, False,
                               False)
    out = torch.empty(T, B, H)

    def run(fn):
        return lambda: fn(layer, xt, h0[0], seq, c0, out)

    with torch.no_grad():
        named = {
            "fused LSTM layer (reference)": lambda: torch._VF.lstm(
                xt, (h0, c0[None]), layer.params, True, 1, 0.0, False, False, False),
            f"rebuild, blocks of {_systems._LSTM_BLOCK} steps (library)": run(
                _systems._lstm_cells),
            "rebuild, one block": run(cells_full_sequence),
            "rebuild, log-depth scan": run(cells_scan),
        }
        ref = torch.empty(T, B, H)
        _systems._lstm_cells(layer, xt, h0[0], seq, c0, ref)
        for name in list(named)[2:]:
            named[name]()
            err = (out - ref).abs().max().item()
            assert err < 1e-5, f"{name} disagrees with the library by {err}"
        return compare(named, rounds)


# ---------------------------------------------------------------------- main
def breakdown(name, model, x, rounds):
    """Where record's time goes besides the fused kernels."""
    system = hl.wrap(model)
    s0 = system.zeros(B)
    states = system.run(x, s0)
    states_np = states.numpy()
    states_np.setflags(write=False)  # as record hands it over: the Trace keeps it as it is
    initial, x_np = s0.numpy(), x.numpy()
    rebuild = " + cell rebuild" if name == "LSTM" else ""
    parts = {
        "wrap (weight copies + fingerprint)": lambda: hl.wrap(model),
        f"system.run (fused kernels{rebuild})": lambda: system.run(x, s0),
        "NaN/Inf check": lambda: _record._warn_non_finite(states_np, system),
        "numpy conversion (states.numpy(), zero-copy)": lambda: states.numpy(),
        "Trace construction (copies initial, inputs)":
            lambda: Trace(states_np, initial, x_np, system.parts, {}),
    }
    for label, fn in parts.items():
        print(f"      {label:45s} {median_ms(fn, rounds):8.2f} ms")


def main(rounds):
    threads = [1, torch.get_num_threads()] if torch.get_num_threads() > 1 else [1]
    default_threads = torch.get_num_threads()
    summary = []
    for n in threads:
        torch.set_num_threads(n)
        print(f"\n=== torch.get_num_threads() = {torch.get_num_threads()} "
              f"(B={B}, T={T}, I={I}, H={H}, {LAYERS} layers, float32, {rounds} rounds) ===")
        for cls in (nn.GRU, nn.LSTM):
            name = cls.__name__
            model, x = build(cls)

            def forward(model=model, x=x):
                with torch.no_grad():
                    model(x)

            med, ratio = compare({"forward": forward,
                                  "record": lambda model=model, x=x: hl.record(model, x)},
                                 rounds)
            ok = ratio["record"] <= TARGETS[name]
            summary.append((n, name, ratio["record"], ok))
            print(f"{name:5s} forward {med['forward']:7.1f} ms   record {med['record']:7.1f} ms"
                  f"   ratio {ratio['record']:.2f}x (target <= {TARGETS[name]}x: "
                  f"{'met' if ok else 'MISSED'})")
            breakdown(name, model, x, rounds)
        model, x = build(nn.LSTM)
        med, ratio = rebuild_variants(model, x, rounds)
        print("      LSTM cell-state rebuild, layer 0 (ms, ratio to the fused layer):")
        for label in med:
            print(f"        {label:45s} {med[label]:8.1f} ms  {ratio[label]:.2f}x")
    torch.set_num_threads(default_threads)
    print("\nsummary: " + "; ".join(f"{name} {r:.2f}x with {n} thread{'s' * (n > 1)}"
                                    f"{'' if ok else ' (MISSED)'}"
                                    for n, name, r, ok in summary))
    return summary


if __name__ == "__main__":
    parser = argparse.ArgumentParser(description=__doc__.splitlines()[0])
    parser.add_argument("--rounds", type=int, default=9, help="timed rounds per figure")
    args = parser.parse_args()
    np.set_printoptions(precision=3)
    main(args.rounds)

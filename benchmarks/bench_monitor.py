"""Overhead of ``hiddenlens.Monitor`` at its default settings on the example training tasks.

Trains each example run (the recipes of ``example_models/train.py``: by default the sorting-line
GRU and the greenhouse LSTM; ``--runs`` adds the tanh RNNs) for ``--steps`` steps twice, once
plain and once calling ``monitor.step(model, k)`` every iteration with the default schedule
(every 50 steps) and figures, on a probe batch of 8 task sequences. Prints the check time as a
fraction of the plain training time, with the load average beside each ratio (a shared machine:
both trainings of a run are measured back to back in one process). ``--steps 50`` makes one
check per 50 steps, the default rate, at half the time. Target: <= 10%.

    python benchmarks/bench_monitor.py [--steps 100] [--runs gru greenhouse-lstm rnn-gain1.0]
"""

from __future__ import annotations

import argparse
import os
import time

import torch

import hiddenlens as hl
from example_models import greenhouse as gh
from example_models import sorting_line as sl
from example_models.train import RECIPES, train_step

TARGET = 0.10
PROBES = {"sorting_line": lambda: sl.make_inputs(8, 200, seed=99),
          "greenhouse": lambda: gh.make_inputs(8, 300, seed=99)}


def train(name: str, steps: int, monitor=None) -> float:
    recipe = RECIPES[name]
    model = recipe.factory(gain=recipe.gain)
    opt = torch.optim.Adam(model.parameters(), lr=recipe.lr)
    model.train()
    t_train = 0.0
    for k in range(steps):
        t0 = time.perf_counter()
        train_step(model, opt, recipe, k)
        t_train += time.perf_counter() - t0
        if monitor is not None:
            monitor.step(model, k)
    return t_train


def main() -> None:
    ap = argparse.ArgumentParser()
    ap.add_argument("--steps", type=int, default=100)
    ap.add_argument("--runs", nargs="+", default=["gru", "greenhouse-lstm"])
    args = ap.parse_args()
    print(f"torch threads {torch.get_num_threads()}, load average {os.getloadavg()}")
    for name in args.runs:
        plain = train(name, args.steps)
        mon = hl.Monitor(PROBES[RECIPES[name].task]())
        train(name, args.steps, mon)
        checks = len(set(mon.timeline.step))
        frac = mon.seconds / plain
        load = ", ".join(f"{v:.1f}" for v in os.getloadavg())
        print(f"{name:16s} training {plain:6.2f} s for {args.steps} steps, {checks} checks "
              f"{mon.seconds:6.2f} s ({mon.seconds / max(checks, 1):.2f} s each): overhead "
              f"{frac:.1%} (target <= {TARGET:.0%}) {'ok' if frac <= TARGET else 'OVER'} "
              f"[load average {load}]", flush=True)
    print(f"load average after {os.getloadavg()}")


if __name__ == "__main__":
    main()

"""Extra time of the intervals in ``compare_runs`` on the demo runs (sorting-line task).

Analyses the shipped runs once without intervals (the demo's inputs, 8 x 150 steps), then
makes the comparison again from those results with the default intervals (bootstrap over the
sequences: array arithmetic) and with ``n_draws=4`` (reruns of memory and fixed points), and
prints each extra time as a fraction of the analyses' time, with the load average beside it.

    python benchmarks/bench_intervals.py [--draws 4]
"""

from __future__ import annotations

import argparse
import os
import time

import torch

import hiddenlens as hl
from hiddenlens._analyses.compare import comparison_of
from hiddenlens._faces.cli import DEMO_PROBE, demo_runs
from hiddenlens.examples import sorting_line


def _load() -> str:
    return ", ".join(f"{v:.1f}" for v in os.getloadavg())


def main() -> None:
    ap = argparse.ArgumentParser()
    ap.add_argument("--draws", type=int, default=4)
    args = ap.parse_args()
    print(f"torch threads {torch.get_num_threads()}, load average {_load()}")
    runs = demo_runs()
    x = sorting_line.make_inputs(*DEMO_PROBE, seed=0)
    t0 = time.perf_counter()
    plain = hl.compare_runs(runs, x, intervals=False)
    base = time.perf_counter() - t0
    print(f"{len(runs)} runs, analyses without intervals {base:6.2f} s [load average {_load()}]")
    systems = {n: hl.wrap(m) for n, m in runs.items()}
    for label, opts in (("bootstrap over sequences (default)", True),
                        (f"with n_draws={args.draws} reruns", {"n_draws": args.draws})):
        t0 = time.perf_counter()
        c = comparison_of(plain.results, systems, intervals=opts)
        extra = time.perf_counter() - t0
        marked = sum(k.endswith("within noise") for k in c.table.columns)
        print(f"{label:36s} +{extra:6.2f} s = {extra / base:6.1%} of the analyses, "
              f"{marked} figures marked [load average {_load()}]", flush=True)


if __name__ == "__main__":
    main()

"""How long `hiddenlens demo` takes from the shell, with 1 thread and with torch's default.

The target is under 60 s on 2 cores, start-up of the interpreter included. CPU seconds (user +
system over all threads) are printed too: unlike wall time they hardly change when other work
shares the machine, so compare them across runs. Each configuration runs
the real command in a fresh process (so imports count), then reads the JSON it wrote to split the
time into analyses (per analysis, summed over runs) and the rest (imports, recording, figures).

    python benchmarks/bench_demo.py [--repeats N]
"""

from __future__ import annotations

import argparse
import json
import os
import resource
import subprocess
import sys
import tempfile
import time
from pathlib import Path

import torch

ROOT = Path(__file__).resolve().parents[1]


def _children_cpu() -> float:
    r = resource.getrusage(resource.RUSAGE_CHILDREN)
    return r.ru_utime + r.ru_stime


def run_demo(threads: int, out: Path) -> tuple[float, float]:
    """Wall seconds and CPU seconds (user + system, all threads) of one demo process."""
    env = dict(os.environ, PYTHONPATH=str(ROOT))
    c0, t0 = _children_cpu(), time.perf_counter()
    subprocess.run([sys.executable, "-m", "hiddenlens", "demo", "-q", "--threads", str(threads),
                    "-o", str(out)], env=env, check=True, cwd=ROOT, stdout=subprocess.DEVNULL)
    return time.perf_counter() - t0, _children_cpu() - c0


def main() -> None:
    parser = argparse.ArgumentParser(description=__doc__.splitlines()[0])
    parser.add_argument("--repeats", type=int, default=1)
    args = parser.parse_args()

    print(f"torch {torch.__version__}, torch.get_num_threads() = {torch.get_num_threads()}, "
          f"os.cpu_count() = {os.cpu_count()}, load average {os.getloadavg()[0]:.1f} (1 min)")
    # the demo runs with --threads 1 unless told otherwise; torch's default is the other case
    configs = [("1 thread (the demo's default)", 1),
               (f"torch's default, {torch.get_num_threads()} threads", torch.get_num_threads())]
    with tempfile.TemporaryDirectory() as tmp:
        for label, threads in configs:
            times, cpus = [], []
            for i in range(args.repeats):
                out = Path(tmp) / f"demo-{threads}-{i}"
                wall, cpu = run_demo(threads, out)
                times.append(wall)
                cpus.append(cpu)
            best = min(times)
            doc = json.loads((out / "report.json").read_text())
            per = {}
            for run in doc["runs"].values():
                for a, s in run["seconds"].items():
                    per[a] = per.get(a, 0.0) + s
            analyses = sum(per.values())
            size = (out / "report.html").stat().st_size / 2**20
            print(f"\n{label}: hiddenlens demo took {best:.1f} s (best of {len(times)}; target "
                  f"< 60 s), {min(cpus):.1f} CPU s, {len(doc['runs'])} runs, report {size:.1f} MiB")
            for a, s in per.items():
                print(f"  {a:14s} {s:6.2f} s  ({s / best:5.1%})")
            print(f"  {'analyses':14s} {analyses:6.2f} s  ({analyses / best:5.1%})")
            print(f"  {'everything else':14s} {best - analyses:6.2f} s  "
                  f"(imports, recording, figures, writing)")
    print(f"\nload average after the runs: {os.getloadavg()[0]:.1f} (1 min)")


if __name__ == "__main__":
    main()

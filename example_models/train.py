"""Retrain the shipped example runs: ``python -m hiddenlens.examples.train [--only NAME ...]``.

Training is deterministic: data come from seeded ``np.random.default_rng`` streams, models are
initialised from private ``torch.Generator`` seeds, and torch runs on one thread. Each run's
weights are written atomically to ``example_models/weights/<run>.pt`` and its figures to
``example_models/weights/training_record.json``.
"""

from __future__ import annotations

import argparse
import json
import math
import os
import platform
import sys
import time
from collections.abc import Callable, Sequence
from dataclasses import dataclass
from pathlib import Path

import numpy as np
import torch
from torch import nn

from . import RUNS, list_runs, probe_inputs_path, tally_weights_path, weights_path
from . import greenhouse as gh
from . import sorting_line as sl
from ._nets import RecurrentReadout, recurrent_spectral_radii

RECORD_PATH = Path(__file__).resolve().parent / "weights" / "training_record.json"

TRAIN_SEED = 10_000  # batch k of training uses data seed TRAIN_SEED + k
EVAL_SEED = 1
DELAY_BANDS = ((2, 4), (5, 9), (10, 19), (20, 40))


@dataclass(frozen=True)
class Recipe:
    """How one run is trained.

    ``recurrent_lr`` is the Adam step size of ``weight_hh_l0``; every other parameter uses
    ``lr``. A small ``recurrent_lr`` keeps the recurrent weights near their initial draw, so
    that runs differing only in the initial gain still differ after training.
    """

    task: str
    factory: Callable[..., RecurrentReadout]
    gain: float
    steps: int
    batch: int
    seq_len: int
    lr: float
    recurrent_lr: float
    clip: float = 1.0  # limit on the global gradient norm


_SORTING = {"task": "sorting_line", "batch": 32, "seq_len": 200, "lr": 3e-3, "recurrent_lr": 1e-5}

RECIPES: dict[str, Recipe] = {
    "rnn-gain0.5": Recipe(factory=sl.make_tanh_rnn, gain=0.5, steps=1000, **_SORTING),
    "rnn-gain1.0": Recipe(factory=sl.make_tanh_rnn, gain=1.0, steps=1000, **_SORTING),
    "rnn-gain2.0": Recipe(factory=sl.make_tanh_rnn, gain=2.0, steps=1000, **_SORTING),
    # The GRU solves the task in fewer steps, and each of its steps costs about three
    # tanh-RNN steps.
    "gru": Recipe(factory=sl.make_gru, gain=1.0, steps=500, **_SORTING),
    "greenhouse-lstm": Recipe(
        task="greenhouse",
        factory=gh.make_model,
        gain=1.0,
        steps=600,
        batch=32,
        seq_len=300,
        lr=3e-3,
        recurrent_lr=3e-3,
    ),
}


def _batch(task: str, n_sequences: int, n_steps: int, seed: int):
    if task == "sorting_line":
        data = sl.make_dataset(n_sequences, n_steps, seed=seed)
        return torch.from_numpy(data.inputs), torch.from_numpy(data.targets)
    data = gh.make_dataset(n_sequences, n_steps, seed=seed)
    return torch.from_numpy(data.inputs), torch.from_numpy(data.targets)


def _loss(task: str, outputs: torch.Tensor, targets: torch.Tensor) -> torch.Tensor:
    if task == "sorting_line":
        return nn.functional.cross_entropy(
            outputs.reshape(-1, outputs.shape[-1]),  # (B*T, 3)
            targets.reshape(-1),  # (B*T,)
            ignore_index=sl.IGNORE,
        )
    return nn.functional.mse_loss(outputs, targets)


@torch.no_grad()
def largest_lyapunov(model: RecurrentReadout, inputs: np.ndarray, *, burn_in: int = 50) -> float:
    """Largest Lyapunov exponent (per step) of the input-driven state, two-trajectory estimate.

    A reference trajectory and one displaced by 1e-8 are run side by side in float64; the
    displacement is measured and rescaled every step (Benettin et al. 1980) and the mean log
    growth after ``burn_in`` steps is returned, averaged over the batch.
    """
    rnn = type(model.rnn)(
        model.rnn.input_size, model.rnn.hidden_size, batch_first=True, device="meta"
    )
    rnn = rnn.to_empty(device="cpu").to(torch.float64)
    rnn.load_state_dict(model.rnn.state_dict())
    x = torch.as_tensor(inputs, dtype=torch.float64)  # (B, T, I)
    n_seq, n_t, _ = x.shape
    size = rnn.hidden_size
    lstm = isinstance(rnn, nn.LSTM)
    gen = torch.Generator().manual_seed(0)
    n_state = 2 * size if lstm else size
    direction = torch.randn(n_seq, n_state, generator=gen, dtype=torch.float64)
    direction /= direction.norm(dim=1, keepdim=True)  # (B, S)
    eps = 1e-8
    state = torch.zeros(n_seq, n_state, dtype=torch.float64)  # (B, S)
    shifted = state + eps * direction

    def step(s: torch.Tensor, x_t: torch.Tensor) -> torch.Tensor:
        if lstm:
            h, c = s[:, :size], s[:, size:]
            _, (h, c) = rnn(x_t, (h[None].contiguous(), c[None].contiguous()))
            return torch.cat([h[0], c[0]], dim=1)
        _, h = rnn(x_t, s[None].contiguous())
        return h[0]

    total = torch.zeros(n_seq, dtype=torch.float64)
    for t in range(n_t):
        x_t = x[:, t : t + 1]  # (B, 1, I)
        state, shifted = step(state, x_t), step(shifted, x_t)
        gap = shifted - state  # (B, S)
        norm = gap.norm(dim=1)  # (B,)
        if t >= burn_in:
            total += torch.log(norm / eps)
        shifted = state + eps * gap / norm[:, None]
    return float(total.mean() / (n_t - burn_in))


def _evaluate(recipe: Recipe, model: RecurrentReadout) -> dict:
    model.eval()
    figures: dict = {}
    if recipe.task == "sorting_line":
        data = sl.make_dataset(256, 200, seed=EVAL_SEED)
        with torch.no_grad():
            loss = _loss(
                recipe.task, model(torch.from_numpy(data.inputs)), torch.from_numpy(data.targets)
            )
        figures["eval_loss"] = float(loss)
        figures["accuracy"] = sl.accuracy(model, data.inputs, data.targets)
        figures["accuracy_by_delay"] = {
            f"{lo}-{hi}": sl.accuracy(
                model, data.inputs, data.targets, where=(data.delays >= lo) & (data.delays <= hi)
            )
            for lo, hi in DELAY_BANDS
        }
        lyap_inputs = data.inputs[:32]
    else:
        data = gh.make_dataset(64, 300, seed=EVAL_SEED)
        with torch.no_grad():
            pred = model(torch.from_numpy(data.inputs)).numpy()
        mse = float(np.mean((pred - data.targets) ** 2))
        figures["eval_loss"] = mse
        figures["rmse"] = math.sqrt(mse)
        figures["r2"] = 1.0 - mse / float(np.var(data.targets))
        lyap_inputs = data.inputs[:32]
    figures["spectral_radius"] = recurrent_spectral_radii(model)
    figures["largest_lyapunov"] = largest_lyapunov(model, lyap_inputs)
    return figures


def train_step(model: nn.Module, optimiser: torch.optim.Optimizer, recipe: Recipe, k: int
               ) -> torch.Tensor:
    """One optimiser step on training batch ``k`` of the recipe (clipped gradients); the loss."""
    x, y = _batch(recipe.task, recipe.batch, recipe.seq_len, TRAIN_SEED + k)
    loss = _loss(recipe.task, model(x), y)
    optimiser.zero_grad()
    loss.backward()
    nn.utils.clip_grad_norm_(model.parameters(), recipe.clip)
    optimiser.step()
    return loss


def fit(
    recipe: Recipe, *, steps: int | None = None, log_every: int = 0, label: str = ""
) -> RecurrentReadout:
    """Build a model from ``recipe.factory`` and train it; returned in eval mode.

    ``steps`` overrides ``recipe.steps``. Only seeded generators are used, so two calls with
    the same arguments give identical weights (on one thread).
    """
    n_steps = recipe.steps if steps is None else steps
    model = recipe.factory(gain=recipe.gain)
    recurrent = [model.rnn.weight_hh_l0]
    others = [p for n, p in model.named_parameters() if n != "rnn.weight_hh_l0"]
    optimiser = torch.optim.Adam(
        [{"params": others}, {"params": recurrent, "lr": recipe.recurrent_lr}], lr=recipe.lr
    )
    model.train()
    for k in range(n_steps):
        loss = train_step(model, optimiser, recipe, k)
        if log_every and (k + 1) % log_every == 0:
            print(f"  {label}: step {k + 1}/{n_steps}  batch loss {loss.item():.4f}")
    return model.eval()


def fit_tally(*, steps: int = 800, seed: int = 0, lr: float = 3e-3) -> RecurrentReadout:
    """Train :func:`sorting_line.make_tally_rnn` on the buffer tally; returned in eval mode.

    A few seconds on one CPU core: Adam, batches of 32 sequences of 50 steps (data seed
    TRAIN_SEED + k for batch k), mean squared error on every step, gradient norm clipped at 1.
    The trained net integrates its inputs: ``hiddenlens.find_fixed_points`` finds its line
    attractor with default settings (tests/test_example_models.py).
    """
    model = sl.make_tally_rnn(seed=seed)
    optimiser = torch.optim.Adam(model.parameters(), lr=lr)
    model.train()
    for k in range(steps):
        data = sl.make_tally(32, 50, seed=TRAIN_SEED + k)
        x, y = torch.from_numpy(data.inputs), torch.from_numpy(data.targets)
        loss = nn.functional.mse_loss(model(x), y)
        optimiser.zero_grad()
        loss.backward()
        nn.utils.clip_grad_norm_(model.parameters(), 1.0)
        optimiser.step()
    return model.eval()


def train_run(name: str, *, log_every: int = 250) -> tuple[RecurrentReadout, dict]:
    """Train run ``name`` from its recipe; returns the model (eval mode) and its figures."""
    recipe = RECIPES[name]
    start, start_cpu = time.perf_counter(), time.process_time()
    model = fit(recipe, log_every=log_every, label=name)
    seconds, cpu_seconds = time.perf_counter() - start, time.process_time() - start_cpu
    figures = {
        "task": recipe.task,
        "cell": model.cell,
        "hidden_size": model.rnn.hidden_size,
        "factory": RUNS[name].factory,
        "init_gain": recipe.gain,
        "steps": recipe.steps,
        "batch": recipe.batch,
        "seq_len": recipe.seq_len,
        "lr": recipe.lr,
        "recurrent_lr": recipe.recurrent_lr,
        "clip": recipe.clip,
        "train_seconds": round(seconds, 2),
        "train_cpu_seconds": round(cpu_seconds, 2),
    }
    figures.update(_evaluate(recipe, model))
    return model, figures


def _atomic_write_bytes(path: Path, write: Callable[[Path], None]) -> None:
    path.parent.mkdir(parents=True, exist_ok=True)
    tmp = path.with_name(path.name + ".tmp")
    try:
        write(tmp)
        os.replace(tmp, path)
    finally:
        if tmp.exists():
            tmp.unlink()


def _save_weights(name: str, model: nn.Module) -> Path:
    path = weights_path(name)
    state = {k: v.detach().clone().contiguous() for k, v in model.state_dict().items()}
    _atomic_write_bytes(path, lambda p: torch.save(state, p))
    return path


def _update_record(name: str, figures: dict) -> None:
    record = {}
    if RECORD_PATH.is_file():
        record = json.loads(RECORD_PATH.read_text())
    record.setdefault("runs", {})[name] = figures
    record["runs"] = {k: record["runs"][k] for k in RUNS if k in record["runs"]}
    record["environment"] = {
        "torch": torch.__version__,
        "numpy": np.__version__,
        "python": platform.python_version(),
        "threads": torch.get_num_threads(),
    }
    text = json.dumps(record, indent=2, sort_keys=False) + "\n"
    _atomic_write_bytes(RECORD_PATH, lambda p: p.write_text(text))


def _write_probe_inputs() -> None:
    path = probe_inputs_path()
    inputs = sl.make_inputs(16, 200, seed=0)
    if path.is_file():
        with np.load(path, allow_pickle=False) as stored:
            if "inputs" in stored and np.array_equal(stored["inputs"], inputs):
                return

    def write(tmp: Path) -> None:
        with open(tmp, "wb") as f:
            np.savez_compressed(f, inputs=inputs)

    _atomic_write_bytes(path, write)


def _summary_line(name: str, fig: dict) -> str:
    radius = ", ".join(f"{g} {r:.3f}" for g, r in fig["spectral_radius"].items())
    if fig["task"] == "sorting_line":
        score = f"accuracy {fig['accuracy']:.3f}  loss {fig['eval_loss']:.3f}"
    else:
        score = f"RMSE {fig['rmse']:.4f}  R^2 {fig['r2']:.4f}"
    return (
        f"{name:<16} {fig['train_seconds']:6.1f} s ({fig['train_cpu_seconds']:.1f} s CPU)  "
        f"{score}  "
        f"spectral radius [{radius}]  largest Lyapunov {fig['largest_lyapunov']:+.3f}"
    )


def main(argv: Sequence[str] | None = None) -> int:
    parser = argparse.ArgumentParser(
        prog="python -m hiddenlens.examples.train",
        description="Retrain the example runs deterministically and overwrite their weights.",
    )
    parser.add_argument(
        "--only", nargs="+", metavar="NAME", choices=list_runs(), help="runs to retrain"
    )
    parser.add_argument(
        "--no-save", action="store_true", help="train and report without writing any file"
    )
    parser.add_argument(
        "--tally", action="store_true",
        help="retrain only the buffer-tally integrator (weights/tally-rnn.pt)",
    )
    args = parser.parse_args(argv)
    names = [] if args.tally and not args.only else (args.only or list_runs())
    tally = args.tally or not args.only
    threads = torch.get_num_threads()
    # One thread is faster for these small layers and keeps the arithmetic order fixed.
    torch.set_num_threads(1)
    torch.set_flush_denormal(True)  # saturated tanh units otherwise slow the CPU down
    try:
        return _train_and_report(names, save=not args.no_save, tally=tally)
    finally:
        torch.set_num_threads(threads)
        torch.set_flush_denormal(False)


def _train_and_report(names: Sequence[str], *, save: bool, tally: bool = False) -> int:
    print(f"torch {torch.__version__}, {torch.get_num_threads()} thread(s)")
    if save:
        _write_probe_inputs()
    lines = []
    if tally:
        start = time.perf_counter()
        model = fit_tally()
        data = sl.make_tally(256, 50, seed=EVAL_SEED)
        with torch.no_grad():
            mse = float(nn.functional.mse_loss(model(torch.from_numpy(data.inputs)),
                                               torch.from_numpy(data.targets)))
        lines.append(f"{'tally-rnn':<16} {time.perf_counter() - start:6.1f} s  "
                     f"MSE {mse:.4f} (target variance {float(np.var(data.targets)):.4f})")
        print(lines[-1])
        if save:
            path = tally_weights_path()
            state = {k: v.detach().clone().contiguous() for k, v in model.state_dict().items()}
            _atomic_write_bytes(path, lambda p: torch.save(state, p))
            print(f"  wrote {path} ({path.stat().st_size} bytes)")
    for name in names:
        print(f"training {name} ...")
        model, figures = train_run(name)
        if save:
            path = _save_weights(name, model)
            _update_record(name, figures)
            print(f"  wrote {path} ({path.stat().st_size} bytes)")
        lines.append(_summary_line(name, figures))
        print(lines[-1])
    print("\nsummary")
    print("\n".join(lines))
    return 0


if __name__ == "__main__":
    sys.exit(main())

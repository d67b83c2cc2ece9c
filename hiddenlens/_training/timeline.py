"""One training run over time: key figures of its checkpoints, ordered by step or epoch.

Checkpoints are read with ``torch.load(weights_only=True)`` only. The order comes from a
``step`` / ``global_step`` / ``epoch`` stored in the checkpoint, else from the file name
(``step_1200.pt``, ``epoch=3-step=900.ckpt``, ``ckpt-0500.pt``).
"""

from __future__ import annotations

import math
import os
import re
from collections.abc import Callable, Collection, Mapping, Sequence
from dataclasses import dataclass
from pathlib import Path
from typing import TYPE_CHECKING, Any

import numpy as np

from .monitor import DEFAULT_FIGURES, check_figures, plot_timeline, probe_figures

if TYPE_CHECKING:  # the aliases of the public signatures
    from .._core.aliases import PathLike, Sequences

__all__ = ["timeline", "Timeline", "as_timeline", "checkpoint_order", "SUFFIXES"]

SUFFIXES = (".pt", ".pth", ".ckpt", ".bin")
_STEP = re.compile(r"(?:global_step|step|iter|iteration)[=_\-]?(\d+)", re.IGNORECASE)
_EPOCH = re.compile(r"epoch[=_\-]?(\d+)", re.IGNORECASE)
_NUMBER = re.compile(r"(\d+)")


@dataclass(frozen=True, eq=False)
class Timeline:
    """Key figures of the checkpoints of one run, in training order.

    Attributes
    ----------
    checkpoints : tuple of str
        C checkpoint names (file names, or ``ckpt<i>`` for in-memory state_dicts), in order.
    steps : ndarray of shape (C,)
        Training step of each checkpoint (-1 where only an epoch is known).
    epochs : ndarray of shape (C,)
        Epoch of each checkpoint (-1 where unknown).
    figures : tuple of str
    values, low, high : ndarray of shape (C, F)
        Figures and their interval bounds (NaN where a checkpoint failed).
    errors : tuple of str or None
    level : float
    """

    checkpoints: tuple[str, ...]
    steps: np.ndarray
    epochs: np.ndarray
    figures: tuple[str, ...]
    values: np.ndarray
    low: np.ndarray
    high: np.ndarray
    errors: tuple[str | None, ...]
    level: float

    def __post_init__(self) -> None:
        from .._core.results import readonly

        for n in ("values", "low", "high"):
            object.__setattr__(self, n, readonly(getattr(self, n), np.float64))
        for n in ("steps", "epochs"):
            object.__setattr__(self, n, readonly(getattr(self, n), np.int64))

    @property
    def x(self) -> np.ndarray:
        """The ordering axis: steps where known for all, else epochs, else the index."""
        if np.all(self.steps >= 0):
            return self.steps
        if np.all(self.epochs >= 0):
            return self.epochs
        return np.arange(len(self.checkpoints))

    @property
    def table(self):
        """pandas DataFrame: step, epoch, checkpoint, figure, value, low, high (long form)."""
        import pandas as pd

        rows = []
        for i, name in enumerate(self.checkpoints):
            for j, f in enumerate(self.figures):
                rows.append({"step": int(self.x[i]), "epoch": int(self.epochs[i]),
                             "checkpoint": name, "figure": f, "value": self.values[i, j],
                             "low": self.low[i, j], "high": self.high[i, j]})
        return pd.DataFrame(rows, columns=["step", "epoch", "checkpoint", "figure", "value",
                                           "low", "high"])

    def to_frame(self):
        """The same as :attr:`table`."""
        return self.table

    def plot(self, ax: Any = None, *, figures: Sequence[str] | None = None, **kw: Any):
        """Each figure against step with its interval band, one panel per figure.

        ``ax`` may hold one Axes per figure; ``label=``, ``color=`` and ``bands=False`` are
        passed to the drawing (several runs on the same panels).
        """
        return plot_timeline(self.table, ax=ax, figures=figures, **kw)

    def __repr__(self) -> str:
        return f"Timeline({len(self.checkpoints)} checkpoints, {len(self.figures)} figures)"


def as_timeline(source: Any, *, level: float | None = None) -> Timeline:
    """A :class:`Timeline` from a Timeline, a :class:`hiddenlens.Monitor` or a timeline table.

    Parameters
    ----------
    source : Timeline, Monitor or pandas.DataFrame
        A table needs the columns step, figure, value, low, high (as ``Monitor.timeline`` or
        ``Timeline.table`` give them; ``epoch`` and ``checkpoint`` are used when present).
    level : float, optional
        Nominal coverage of the intervals of a table (default: the monitor's, else 0.9).
    """
    if isinstance(source, Timeline):
        return source
    if hasattr(source, "timeline") and hasattr(source, "figures") \
            and hasattr(source, "level"):  # a Monitor
        return as_timeline(source.timeline, level=source.level if level is None else level)
    if not (hasattr(source, "columns") and hasattr(source, "groupby")):
        raise TypeError(f"expected a Timeline, a Monitor or a timeline table (a DataFrame with "
                        f"step, figure, value, low, high), got {type(source).__name__}")
    need = ["step", "figure", "value", "low", "high"]
    missing = [c for c in need if c not in source.columns]
    if missing:
        raise ValueError(f"the timeline table lacks the columns {missing}; expected "
                         f"{', '.join(need)} as Monitor.timeline gives them")
    if len(source) == 0:
        raise ValueError("the timeline table is empty: nothing was recorded yet")
    figures = tuple(dict.fromkeys(str(f) for f in source["figure"]))
    steps = sorted({int(s) for s in source["step"]})
    where = {s: i for i, s in enumerate(steps)}
    C, F = len(steps), len(figures)
    vals, lows, highs = (np.full((C, F), math.nan) for _ in range(3))
    epochs = np.full(C, -1)
    names = [f"step {s}" for s in steps]
    for r in source.itertuples(index=False):
        i, j = where[int(r.step)], figures.index(str(r.figure))
        vals[i, j], lows[i, j], highs[i, j] = float(r.value), float(r.low), float(r.high)
        if "epoch" in source.columns:
            epochs[i] = int(r.epoch)
        if "checkpoint" in source.columns:
            names[i] = str(r.checkpoint)
    return Timeline(checkpoints=tuple(names), steps=np.array(steps), epochs=epochs,
                    figures=figures, values=vals, low=lows, high=highs, errors=(None,) * C,
                    level=0.9 if level is None else float(level))


def timelines_by_run(timelines: Any, runs: Collection[str], *, name: str,
                     where: str) -> dict[str, Timeline]:
    """Run name -> Timeline from a mapping of runs' timelines, or from one Timeline, Monitor or
    table (the first run's); ``name`` is the option and ``where`` the runs' place, for the error
    about unknown runs. None gives {}; a mapping's None values are left out."""
    if timelines is None:
        return {}
    if isinstance(timelines, Mapping):
        unknown = [str(k) for k in timelines if k not in runs]
        if unknown:
            raise ValueError(f"{name} names runs that are not {where}: {', '.join(unknown)}; "
                             f"the runs are {', '.join(runs)}")
        return {str(k): as_timeline(v) for k, v in timelines.items() if v is not None}
    return {next(iter(runs)): as_timeline(timelines)}


# ---------------------------------------------------------------------- ordering
def _from_name(name: str) -> tuple[int, int]:
    stem = Path(name).name
    s, e = _STEP.search(stem), _EPOCH.search(stem)
    step = int(s.group(1)) if s else -1
    epoch = int(e.group(1)) if e else -1
    if step < 0 and epoch < 0:
        nums = _NUMBER.findall(Path(stem).stem)
        if len(nums) == 1:
            step = int(nums[0])
    return step, epoch


def _stored(state: Any, key: str) -> int:
    if isinstance(state, Mapping):
        for k in ((key,) if key == "epoch" else ("step", "global_step")):
            v = state.get(k)
            if isinstance(v, (int, np.integer)) and not isinstance(v, bool):
                return int(v)
            if hasattr(v, "numel") and v.numel() == 1:
                return int(v.item())
    return -1


def checkpoint_order(names: Sequence[str], states: Sequence[Any]) -> list[tuple[int, int]]:
    """(step, epoch) of each checkpoint: stored in it, else parsed from its file name."""
    out = []
    for name, state in zip(names, states, strict=True):
        ns, ne = _from_name(name)
        s, e = _stored(state, "step"), _stored(state, "epoch")
        out.append((s if s >= 0 else ns, e if e >= 0 else ne))
    return out


def _state_dict(state: Any, model: Any) -> Mapping[str, Any]:
    """The model weights inside a checkpoint (a bare state_dict or a dict holding one)."""
    if isinstance(state, Mapping):
        for k in ("state_dict", "model_state_dict", "model"):
            if isinstance(state.get(k), Mapping):
                state = state[k]
                break
    if not isinstance(state, Mapping):
        raise ValueError("the checkpoint holds no state_dict (a dict of tensors)")
    expected = set(model.state_dict())
    if not expected <= set(state):
        # a framework checkpoint prefixes names with the attribute holding the model
        for prefix in {k.split(".", 1)[0] + "." for k in state if "." in k}:
            stripped = {k[len(prefix):]: v for k, v in state.items() if k.startswith(prefix)}
            if expected <= set(stripped):
                return stripped
    return state


def _load(path: str) -> Any:
    import torch

    try:
        return torch.load(path, map_location="cpu", weights_only=True)
    except Exception as err:
        msg = str(err).strip().splitlines()[0] if str(err).strip() else type(err).__name__
        raise ValueError(f"cannot read checkpoint {path!r} with weights_only=True: {msg}") \
            from err


def _resolve_factory(factory: Any) -> Callable[[], Any]:
    if isinstance(factory, str):
        from .sweep import import_factory

        try:
            return import_factory(factory)
        except (ImportError, AttributeError, ValueError) as err:
            raise ValueError(f"cannot import the factory {factory!r}: {err}; expected "
                             "'package.module:function'") from err
    if not callable(factory):
        raise TypeError(f"factory must be a callable that builds the model or a "
                        f"'package.module:function' name, got {type(factory).__name__}")
    return factory


def _collect(checkpoints: Any) -> tuple[list[str], list[Any]]:
    if isinstance(checkpoints, (str, os.PathLike)):
        folder = Path(checkpoints)
        if not folder.is_dir():
            raise ValueError(f"checkpoints {str(folder)!r} is not a folder; pass a folder of "
                             f"checkpoint files ({', '.join(SUFFIXES)}) or a list")
        files = sorted(p for p in folder.iterdir() if p.suffix in SUFFIXES and p.is_file())
        if not files:
            raise ValueError(f"no checkpoint files ({', '.join(SUFFIXES)}) in {str(folder)!r}")
        return [str(p) for p in files], [None] * len(files)
    items = list(checkpoints)
    if not items:
        raise ValueError("checkpoints is empty; pass a folder or a list of paths/state_dicts")
    names, states = [], []
    for i, c in enumerate(items):
        if isinstance(c, (str, os.PathLike)):
            names.append(os.fspath(c))
            states.append(None)
        elif isinstance(c, Mapping):
            names.append(f"ckpt{i}")
            states.append(c)
        else:
            raise TypeError(f"checkpoints[{i}] must be a path or a state_dict, got "
                            f"{type(c).__name__}")
    return names, states


def _load_files(names: list[str], states: list[Any]) -> list[str | None]:
    """Read the checkpoints given as paths into ``states``; the error of each one that fails."""
    errors: list[str | None] = [None] * len(names)
    for i, (n, s) in enumerate(zip(names, states, strict=True)):
        if s is None:
            try:
                states[i] = _load(n)
            except ValueError as err:
                errors[i] = str(err)
    return errors


def _training_order(keys: Sequence[tuple[int, int]]) -> list[int]:
    """Indices by step (then epoch) when every checkpoint has a step, else by epoch when every
    one has an epoch, else as given."""
    idx = list(range(len(keys)))
    steps = [k[0] for k in keys]
    epochs = [k[1] for k in keys]
    if all(s >= 0 for s in steps):
        idx.sort(key=lambda i: (steps[i], epochs[i]))
    elif all(e >= 0 for e in epochs):
        idx.sort(key=lambda i: epochs[i])
    return idx


def _loaded(make: Any, state: Any) -> Any:
    """A new model from the factory with the checkpoint's weights."""
    import torch

    model = make()
    with torch.no_grad():
        model.load_state_dict(_state_dict(state, model))
    return model


# ---------------------------------------------------------------------- public function
def timeline(
    checkpoints: PathLike | Sequence[PathLike],
    factory: Callable[..., Any] | str,
    inputs: Sequences,
    *,
    figures: Sequence[str] = DEFAULT_FIGURES,
    seed: int = 0,
    level: float = 0.9,
    n_boot: int = 100,
    order: str = "auto",
    progress: bool = True,
) -> Timeline:
    """Key figures with intervals at every checkpoint of one run, in training order.

    Parameters
    ----------
    checkpoints : folder, or sequence of paths or state_dicts
        A folder (files ending in .pt, .pth, .ckpt, .bin) or a list.
    factory : callable or str
        Builds the untrained model with no arguments (or ``"package.module:function"``).
    inputs : ndarray of shape (B, T, I)
        The probe batch, the same for every checkpoint.
    figures, seed, level, n_boot
        As in :class:`hiddenlens.Monitor`.
    order : {"auto", "given"}, default "auto"
        ``"auto"``: sort by step (or epoch) stored in the checkpoints or parsed from their
        names, falling back to the order given; ``"given"``: keep the order given.
    progress : bool, default True

    Returns
    -------
    Timeline
        A checkpoint that cannot be read or loaded has NaN figures and its error.
    """
    figures = check_figures(figures)
    if order not in ("auto", "given"):
        raise ValueError(f"order must be 'auto' or 'given', got {order!r}")
    make = _resolve_factory(factory)
    names, states = _collect(checkpoints)
    errors = _load_files(names, states)
    keys = checkpoint_order(names, states)
    idx = _training_order(keys) if order == "auto" else list(range(len(names)))
    x = inputs.detach().cpu().numpy() if hasattr(inputs, "detach") else np.asarray(inputs)
    C, F = len(idx), len(figures)
    vals, lows, highs = (np.full((C, F), math.nan) for _ in range(3))
    from tqdm.auto import tqdm

    for row, i in enumerate(tqdm(idx, desc="checkpoints", leave=False, disable=not progress)):
        if errors[i] is not None:
            continue
        try:
            got = probe_figures(_loaded(make, states[i]), x, figures, seed=seed, level=level,
                                n_boot=n_boot)
        except Exception as err:  # one bad checkpoint is reported, not fatal
            errors[i] = f"{type(err).__name__}: {err}"
            continue
        for r in got:
            j = figures.index(r["figure"])
            vals[row, j], lows[row, j], highs[row, j] = r["value"], r["low"], r["high"]
    return Timeline(
        checkpoints=tuple(Path(names[i]).name for i in idx),
        steps=np.array([keys[i][0] for i in idx]), epochs=np.array([keys[i][1] for i in idx]),
        figures=figures, values=vals, low=lows, high=highs,
        errors=tuple(errors[i] for i in idx), level=float(level))

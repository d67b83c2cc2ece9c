"""The ``hiddenlens`` command: write an HTML report for trained weights, or run the demo.

    hiddenlens report --model pkg.module:factory --weights run_a.pt run_b.pt -o out/
    hiddenlens demo -o hiddenlens-demo
    hiddenlens --version
"""

from __future__ import annotations

import argparse
import importlib
import os
import sys
import time
from collections.abc import Callable, Sequence
from pathlib import Path
from typing import Any

from .._version import __version__

__all__ = ["main", "build_parser"]

PROG = "hiddenlens"
DEFAULT_PROBE = (8, 200)
DEMO_PROBE = (8, 150)
#: one-crate trials (sequences, steps) of the demo's task-variable memory
DEMO_TRIALS = (48, 80)
#: greenhouse inputs (sequences, steps) of ``hiddenlens demo --task greenhouse``
DEMO_DAYS = (8, 300)


class CommandError(Exception):
    """A problem with the command's arguments or files, shown as one line."""


# ---------------------------------------------------------------------- arguments
def build_parser() -> argparse.ArgumentParser:
    """The argument parser of the ``hiddenlens`` command."""
    parser = argparse.ArgumentParser(
        prog=PROG,
        description="Probe the hidden-state dynamics of recurrent PyTorch models and write a "
                    "self-contained HTML report.",
    )
    parser.add_argument("--version", action="version", version=f"{PROG} {__version__}")
    sub = parser.add_subparsers(dest="command", metavar="COMMAND")

    rep = sub.add_parser(
        "report", help="analyse trained weights and write an HTML + JSON report",
        description="Build the model with a factory, load each weights file into it, analyse "
                    "every run on the same inputs, and write one HTML report (several weights "
                    "files: a comparison) and a JSON file of the figures.",
    )
    rep.add_argument("--model", required=True, metavar="MODULE:FUNCTION",
                     help="importable factory that builds the model with no arguments, "
                          "e.g. mypackage.nets:make_model; it runs as Python code, so name "
                          "only code you trust (the working directory is searched for it)")
    what = rep.add_mutually_exclusive_group(required=True)
    what.add_argument("--weights", nargs="+", metavar="FILE",
                      help="one or more state_dict files (torch.save(model.state_dict(), ...))")
    what.add_argument("--checkpoints", metavar="DIR",
                      help="a folder of checkpoints of one run (.pt, .pth, .ckpt, .bin), read "
                           "as one run over time: ordered by the step or epoch stored in each "
                           "or in its file name, the last one analysed in full and the key "
                           "figures of all of them shown in an 'Over training' section")
    rep.add_argument("--names", nargs="+", metavar="NAME",
                     help="a name per weights file (default: the file names without suffix)")
    src = rep.add_mutually_exclusive_group()
    src.add_argument("--inputs", metavar="FILE[:KEY]",
                     help="inputs (B, T, I) or (T, I) from a .npy file or a .npz file "
                          "(KEY picks the array when the .npz holds several)")
    src.add_argument("--probe", metavar="N,T", type=_probe_shape,
                     help="N i.i.d. standard-normal probe sequences of T steps (default "
                          f"{DEFAULT_PROBE[0]},{DEFAULT_PROBE[1]} when --inputs is not given)")
    _common_options(rep, default_output="hiddenlens-report", threads=None)
    rep.add_argument("--title", help="title of the report")
    _model_options(rep)

    demo = sub.add_parser(
        "demo", help="report on the shipped example runs (sorting-line task)",
        description="Compare the shipped example runs (tanh RNNs trained from three recurrent "
                    "init gains and a GRU, all on the sorting-line task) and write the report; "
                    "--task greenhouse reports on the greenhouse LSTM instead.",
    )
    _common_options(demo, default_output="hiddenlens-demo", threads=1)
    demo.add_argument("--task", choices=("sorting_line", "greenhouse"), default="sorting_line",
                      help="which example task's runs to report on (default sorting_line: "
                           "task memory of the tag colour; greenhouse: of the day's weather)")
    _add_timeline_parser(sub)
    return parser


# ---------------------------------------------------------------------- timeline subcommand
def _add_timeline_parser(sub: Any) -> None:
    tl = sub.add_parser(
        "timeline", help="key figures of a folder of checkpoints of one run, over training",
        description="Read every checkpoint in a folder as one run over time (ordered by the "
                    "step or epoch stored in it or in its file name) and write an HTML page "
                    "of the key figures against step.")
    tl.add_argument("--model", required=True, metavar="MODULE:FUNCTION",
                    help="importable factory that builds the model with no arguments")
    tl.add_argument("--checkpoints", required=True, metavar="DIR",
                    help="folder of checkpoints (.pt, .pth, .ckpt, .bin)")
    tl.add_argument("--inputs", required=True, metavar="FILE[:KEY]",
                    help="probe inputs (B, T, I) from a .npy or .npz file")
    tl.add_argument("-o", "--output", default="hiddenlens-timeline", metavar="PATH",
                    help="folder for timeline.html, or a path ending in .html")
    tl.add_argument("--seed", type=int, default=0, help="seed of the analyses (default 0)")
    tl.add_argument("--threads", type=_positive_int, default=None, metavar="N",
                    help="torch threads (default: torch's default)")
    tl.add_argument("-q", "--quiet", action="store_true", help="no progress bar")


def _cmd_timeline(args: argparse.Namespace) -> int:
    from .._training.timeline import timeline
    from .timeline_report import write_timeline_page

    load_factory(args.model)  # a clear message for a bad --model before any work
    inputs = load_inputs(args.inputs)
    result = timeline(args.checkpoints, args.model, inputs, seed=args.seed,
                      progress=not args.quiet)
    path = write_timeline_page(result, args.output, source=f"checkpoints in "
                               f"{args.checkpoints}; inputs from {args.inputs}")
    print(path)
    return 0


def _common_options(p: argparse.ArgumentParser, *, default_output: str,
                    threads: int | None) -> None:
    p.add_argument("-o", "--output", default=default_output, metavar="PATH",
                   help="folder for report.html and report.json, or a path ending in .html "
                        f"(default: ./{default_output})")
    from .._core.registry import analyses

    p.add_argument("--analyses", nargs="+", metavar="NAME",
                   help="analyses to run, space- or comma-separated (default: all): "
                        + ", ".join(analyses()))
    p.add_argument("--seed", type=int, default=0,
                   help="seed of the probe inputs and of the analyses' random starts "
                        "(default 0)")
    p.add_argument("--keep-going", action="store_true",
                   help="leave out an analysis that fails (noted in the report) instead of "
                        "stopping")
    p.add_argument("--threads", type=_positive_int, default=threads, metavar="N",
                   help="torch threads for the analyses (default: "
                        + ("torch's default" if threads is None else
                           f"{threads}; the example models are small, so one thread is fastest")
                        + ")")
    p.add_argument("-q", "--quiet", action="store_true", help="no progress lines on stderr")
    p.add_argument("--force", action="store_true",
                   help="replace an existing report at the output path")


def _positive_int(text: str) -> int:
    try:
        value = int(text)
    except ValueError:
        value = 0
    if value < 1:
        raise argparse.ArgumentTypeError(f"expected a positive integer, got {text!r}")
    return value


def _probe_shape(text: str) -> tuple[int, int]:
    try:
        n, t = (int(v) for v in text.split(","))
    except ValueError:
        raise argparse.ArgumentTypeError(
            f"expected N,T (two positive integers, e.g. 8,200), got {text!r}") from None
    if n < 1 or t < 2:
        raise argparse.ArgumentTypeError(f"N must be >= 1 and T >= 2, got {text!r}")
    return n, t


def _analyses(values: Sequence[str] | None) -> list[str] | None:
    from .._core.registry import analyses

    if not values:
        return None
    names = [v.strip() for item in values for v in item.split(",") if v.strip()]
    bad = [n for n in names if n not in analyses()]
    if bad:
        raise CommandError(f"unknown analysis {bad[0]!r}; choose among {', '.join(analyses())}")
    return list(dict.fromkeys(names))


def _output_paths(output: str, force: bool = False) -> Path:
    out = _output_path(output)
    if out.exists() and not force:
        raise CommandError(f"a report already exists at {str(out)!r}; pass --force to replace "
                           "it or choose another --output")
    return out


def _output_path(output: str) -> Path:
    p = Path(output)
    if p.suffix.lower() in (".html", ".htm"):
        return p
    if p.exists() and not p.is_dir():
        raise CommandError(f"--output {output!r} is an existing file; give a folder or a path "
                           "ending in .html")
    return p / "report.html"


# ---------------------------------------------------------------------- loading
def load_factory(spec: str) -> Callable[[], Any]:
    """Import ``"package.module:function"`` and return the function."""
    module_name, sep, attr = spec.partition(":")
    if not sep or not module_name or not attr or ":" in attr:
        raise CommandError(f"--model must look like package.module:function, got {spec!r}")
    # like `python -m`, factories next to the user's files are found, but the working folder
    # is on the path only while this import runs: a stray file there must not shadow the
    # libraries the analyses import later
    cwd = os.getcwd()
    added = "" not in sys.path and cwd not in sys.path
    if added:
        sys.path.insert(0, cwd)
    try:
        module = importlib.import_module(module_name)
    except ImportError as err:
        raise CommandError(f"cannot import module {module_name!r} named in --model: {err}; "
                           "check the spelling and that it is on the Python path") from err
    finally:
        if added and cwd in sys.path:
            sys.path.remove(cwd)
    fn = module
    for part in attr.split("."):
        fn = getattr(fn, part, None)
        if fn is None:
            raise CommandError(f"module {module_name!r} has no attribute {attr!r} "
                               "(the factory named in --model)")
    if not callable(fn):
        raise CommandError(f"{spec!r} is not callable; --model must name a function that "
                           "returns the model")
    return fn


def build_model(spec: str) -> Any:
    """Call the factory named by ``spec`` with no arguments; it must return an nn.Module."""
    import torch

    fn = load_factory(spec)
    try:
        model = fn()
    except Exception as err:
        raise CommandError(f"the factory {spec} failed: {type(err).__name__}: {err}") from err
    if not isinstance(model, torch.nn.Module):
        raise CommandError(f"the factory {spec} returned a {type(model).__name__}, not a "
                           "torch.nn.Module")
    return model


def load_weights(model: Any, path: str, spec: str) -> None:
    """Load a state_dict file into ``model`` after checking that every key and shape fits."""
    import torch

    if not os.path.isfile(path):
        raise CommandError(f"weights file {path!r} not found")
    try:
        state = torch.load(path, map_location="cpu", weights_only=True)
    except Exception as err:
        msg = str(err).strip().splitlines()[0] if str(err).strip() else type(err).__name__
        raise CommandError(f"cannot read weights from {path!r}: {msg}") from err
    if not isinstance(state, dict) or not all(isinstance(v, torch.Tensor)
                                              for v in state.values()):
        raise CommandError(f"{path!r} does not hold a state_dict (a dict of tensors); save one "
                           "with torch.save(model.state_dict(), path)")
    expected = model.state_dict()
    missing = [k for k in expected if k not in state]
    unexpected = [k for k in state if k not in expected]
    shapes = [f"{k} {tuple(state[k].shape)} in the file vs {tuple(expected[k].shape)} in the "
              "model" for k in expected if k in state and state[k].shape != expected[k].shape]
    problems = []
    if missing:
        problems.append(f"missing keys {', '.join(missing[:4])}{' ...' * (len(missing) > 4)}")
    if unexpected:
        problems.append(f"unexpected keys {', '.join(unexpected[:4])}"
                        f"{' ...' * (len(unexpected) > 4)}")
    if shapes:
        problems.append(f"shape mismatch: {'; '.join(shapes[:3])}")
    if problems:
        raise CommandError(f"weights {path!r} do not fit the model built by {spec}: "
                           f"{'; '.join(problems)}")
    with torch.no_grad():
        model.load_state_dict(state)
    model.eval()


def _read_array(np: Any, fh: Any, path: str, key: str | None) -> Any:
    """The array of an open .npy file, or array ``key`` of an .npz file (no pickles)."""
    try:
        data = np.load(fh, allow_pickle=False)
    except Exception as err:
        msg = str(err).strip().splitlines()[0] if str(err).strip() else type(err).__name__
        raise CommandError(f"cannot read inputs from {path!r} (expected .npy or .npz without "
                           f"pickled objects): {msg}") from err
    if isinstance(data, np.lib.npyio.NpzFile):
        with data:
            if key is None:
                if len(data.files) != 1:
                    raise CommandError(f"{path!r} holds arrays {', '.join(data.files)}; pick "
                                       f"one with --inputs {path}:KEY")
                key = data.files[0]
            if key not in data.files:
                raise CommandError(f"{path!r} has no array {key!r}; it holds "
                                   f"{', '.join(data.files)}")
            try:
                arr = data[key]
            except Exception as err:  # damaged archives raise zipfile, zlib and EOF errors
                msg = " ".join(str(err).split())[:200] or type(err).__name__
                raise CommandError(f"cannot read array {key!r} of {path!r}, the file is "
                                   f"damaged: {type(err).__name__}: {msg}") from None
    else:
        if key is not None:
            raise CommandError("a :KEY suffix applies to .npz files only")
        arr = data
    return arr


def _split_spec(spec: str) -> tuple[str, str | None]:
    """``file.npz:key`` -> (``file.npz``, ``key``); any other spec is a path with no key."""
    head, sep, tail = spec.rpartition(":")
    if sep and head.lower().endswith(".npz") and tail:
        return head, tail
    return spec, None


def load_inputs(spec: str, *, raw: bool = False) -> Any:
    """Read inputs from ``file.npy`` or ``file.npz[:key]`` (never unpickling anything).

    ``raw``: the inputs go to the model's front end (``--front``), so integer token ids of
    shape (B, T) or (T,) are accepted besides float features.
    """
    import numpy as np

    path, key = _split_spec(spec)
    if not os.path.exists(path):
        raise CommandError(f"inputs file {path!r} not found")
    if not os.path.isfile(path):
        raise CommandError(f"inputs {path!r} is not a regular file (a folder, pipe or device)")
    # our own handle, closed however numpy fails on a damaged file
    with open(path, "rb") as fh:
        arr = _read_array(np, fh, path, key)
    if raw and np.issubdtype(arr.dtype, np.integer) and not np.issubdtype(arr.dtype, np.bool_):
        if arr.ndim not in (1, 2):
            raise CommandError(f"token ids in {spec!r} have shape {arr.shape}; expected (B, T) "
                               "or (T,) integers for the front end")
        return arr[None] if arr.ndim == 1 else arr  # (B, T) token ids
    if not np.issubdtype(arr.dtype, np.floating):
        hint = ("integer token ids are read with --front naming the embedding"
                if np.issubdtype(arr.dtype, np.integer) else
                "one-hot encode tokens and save as float32")
        raise CommandError(f"inputs in {spec!r} have dtype {arr.dtype}; expected floating-point "
                           f"numbers ({hint})")
    if arr.ndim not in (2, 3):
        raise CommandError(f"inputs in {spec!r} have shape {arr.shape}; expected (B, T, I) or "
                           "(T, I)")
    if arr.ndim == 2:
        arr = arr[None]
    return arr


def load_array(spec: str, what: str) -> Any:
    """Read the array of ``file.npy`` or ``file.npz[:key]`` for option ``what`` (no pickles)."""
    import numpy as np

    path, key = _split_spec(spec)
    if not os.path.isfile(path):
        raise CommandError(f"{what} file {path!r} not found (or not a regular file)")
    with open(path, "rb") as fh:
        try:
            return _read_array(np, fh, path, key)
        except CommandError as err:
            raise CommandError(str(err).replace("--inputs", what).replace(
                "read inputs", f"read {what}")) from None


def _context(args: argparse.Namespace) -> dict[str, Any] | None:
    """``--targets`` and ``--onsets`` as the analyses' context."""
    if getattr(args, "onsets", None) and not getattr(args, "targets", None):
        raise CommandError("--onsets needs --targets (the task variable the lags count for)")
    if not getattr(args, "targets", None):
        return None
    context = {"targets": load_array(args.targets, "--targets")}
    if args.onsets:
        context["onsets"] = load_array(args.onsets, "--onsets")
    return context


def _probe(n: int, t: int, input_size: int, seed: int):
    import numpy as np

    rng = np.random.default_rng(seed)
    return rng.standard_normal((n, t, input_size)).astype(np.float32)  # (B, T, I)


# ---------------------------------------------------------------------- running
class _Progress:
    """Per-step lines on stderr with elapsed seconds."""

    def __init__(self, quiet: bool) -> None:
        self.quiet = quiet
        self.t0 = time.perf_counter()

    def __call__(self, message: str, done: int | None = None, total: int | None = None) -> None:
        if self.quiet or message == "done":
            return
        # done counts finished steps: the step under way is done + 1, never past the total
        count = f"[{min(done + 1, total)}/{total}] " if done is not None and total else ""
        print(f"{PROG}: {time.perf_counter() - self.t0:6.1f} s  {count}{message}",
              file=sys.stderr, flush=True)


# ---------------------------------------------------------------------- the user's own model
def _model_options(rep: argparse.ArgumentParser) -> None:
    """Options that pick the recurrent part of a user's model and tune the analyses."""
    rep.add_argument("--submodule", metavar="NAME",
                     help="the recurrent submodule to analyse when the model holds several")
    rep.add_argument("--cell", metavar="NAME",
                     help="a submodule that is a cell of your own, called as cell(input, hidden)")
    rep.add_argument("--front", metavar="NAME",
                     help="a submodule that turns the raw --inputs into the recurrent part's "
                          "inputs (an embedding fed integer token ids (B, T), or a linear "
                          "encoder)")
    rep.add_argument("--direction", choices=("forward", "backward"),
                     help="the direction of a bidirectional recurrent module")
    rep.add_argument("--layer", type=int, metavar="K",
                     help="one layer of a stacked module, fed by the layers below (default for "
                          "a bidirectional stack: the top layer)")
    rep.add_argument("--lengths", metavar="FILE[:KEY]",
                     help="real lengths (B,) of padded --inputs, from .npy or .npz")
    rep.add_argument("--targets", metavar="FILE[:KEY]",
                     help="a task variable per sequence (B,) or per step (B, T) of --inputs, "
                          "from .npy or .npz: adds the task-variable memory analysis")
    rep.add_argument("--onsets", metavar="FILE[:KEY]",
                     help="the event step (B,) of each sequence that --targets lags count "
                          "from (default: the first step)")
    rep.add_argument("--option", action="append", default=[], metavar="ANALYSIS.KEY=VALUE",
                     help="an analysis option, e.g. lyapunov.k=5 (a Python literal; repeat)")


def _user_run(args: argparse.Namespace, weights: str, *, quiet: bool) -> Any:
    """Build the model, load one checkpoint into it, and wrap the part to analyse."""
    import sys

    import torch

    from .._core.checkpoints import load_weights as load_checkpoint
    from .._core.systems import RecurrentSystem, wrap

    fn = load_factory(args.model)
    try:
        built = fn()
    except Exception as err:
        raise CommandError(f"the factory {args.model} failed: {type(err).__name__}: {err}"
                           ) from err
    if isinstance(built, RecurrentSystem):
        raise CommandError(
            f"the factory {args.model} returned a RecurrentSystem, which already holds its "
            "weights; return the module (or cell) instead so --weights can be loaded into it")
    if not isinstance(built, torch.nn.Module):
        raise CommandError(f"the factory {args.model} returned a {type(built).__name__}, not a "
                           "torch.nn.Module")
    try:
        loaded = load_checkpoint(built, weights)
    except FileNotFoundError as err:
        raise CommandError(str(err)) from None
    except (ValueError, TypeError) as err:
        if str(err).startswith("cannot read weights"):
            raise CommandError(str(err)) from None
        raise CommandError(f"weights {weights!r} do not fit the model built by {args.model}: "
                           f"{err}") from None
    if loaded.extra_keys and not quiet:
        print(f"note: {weights}: keys not used by the model: {', '.join(loaded.extra_keys)}",
              file=sys.stderr)
    model = loaded.model.eval()
    if args.submodule or args.cell or args.front or args.direction or args.layer is not None:
        return wrap(model, submodule=args.submodule, cell=args.cell, front=args.front,
                    direction=args.direction, layer=args.layer)
    return model


def _user_options(args: argparse.Namespace, runs: dict[str, Any], inputs: Any
                  ) -> tuple[dict[str, dict[str, Any]] | None, Any]:
    """``--option`` values as per-analysis options, and a trace recorded with ``--lengths``."""
    import ast

    options: dict[str, dict[str, Any]] = {}
    for text in args.option:
        key, sep, value = text.partition("=")
        analysis, dot, name = key.strip().partition(".")
        if not (sep and dot and analysis and name):
            raise CommandError(f"--option {text!r} must read ANALYSIS.KEY=VALUE, e.g. "
                               "lyapunov.k=5")
        try:
            parsed = ast.literal_eval(value.strip())
        except (ValueError, SyntaxError):
            raise CommandError(f"--option {text!r}: {value!r} is not a Python literal (a number, "
                               "string in quotes, list, True/False/None)") from None
        options.setdefault(analysis, {})[name] = parsed
    trace = None
    if args.lengths:
        if len(runs) != 1:
            raise CommandError("--lengths applies to one weights file at a time")
        from .._core.record import record

        data = load_array(args.lengths, "--lengths")
        trace = record(next(iter(runs.values())), inputs, lengths=data)
    return options or None, trace


def _run_report(runs: dict[str, Any], inputs: Any, *, out: Path, which: list[str] | None,
                seed: int, keep_going: bool, quiet: bool, title: str | None,
                source: str, options: dict[str, dict[str, Any]] | None = None,
                trace: Any = None, context: dict[str, Any] | None = None,
                task: dict[str, dict[str, Any]] | None = None,
                timeline: dict[str, Any] | None = None) -> Path:
    from .._analyses.compare import compare_runs
    from .._analyses.figures import describe_inputs
    from .._analyses.runner import run_analyses
    from .._core.registry import analyses, available_analyses
    from .report import write_report

    say = _Progress(quiet)
    notes = []
    if which is None:
        absent = [a for a in analyses() if a not in available_analyses()]
        if absent:
            notes.append(f"Not available in this installation and left out: "
                         f"{', '.join(absent)}.")
    on_error = "skip" if keep_going else "raise"
    description = describe_inputs(inputs, source=source)
    if len(runs) == 1:
        name, model = next(iter(runs.items()))
        results: Any = run_analyses(model, inputs, which=which, options=options, seed=seed,
                                    on_error=on_error, trace=trace, context=context,
                                    progress=lambda s, d, t: say(f"{name}: {s}", d, t))
        kwargs: dict[str, Any] = {"name": name}
    else:
        results = compare_runs(runs, inputs, which=which, options=options, seed=seed,
                               on_error=on_error, progress=say, context=context)
        kwargs = {}
    if task:
        kwargs["task"] = task
    if timeline:
        kwargs["timeline"] = timeline
        notes.append(f"{next(iter(timeline))}: the last checkpoint in training order is "
                     "analysed in full; the 'Over training' section shows the key figures of "
                     "every checkpoint on the same inputs.")
    say("writing the report")
    path = write_report(results, out, title=title, inputs_description=description,
                        notes=notes, progress=say, **kwargs)
    say(f"done: {path}")
    return path


def _checkpoint_timeline(args: argparse.Namespace, inputs: Any) -> tuple[Any, Any, str]:
    """The timeline of ``--checkpoints`` (on ``inputs`` or the probe) and its last good file."""
    from .._core.record import as_system
    from .._training.timeline import timeline

    if args.submodule or args.cell or args.front:
        raise CommandError("--checkpoints reads the whole model the factory builds; "
                           "--submodule, --cell and --front apply to --weights only")
    folder = Path(args.checkpoints)
    if not folder.is_dir():
        raise CommandError(f"--checkpoints {args.checkpoints!r} is not a folder; pass the "
                           "folder holding one run's checkpoint files")
    if inputs is None:
        n, t = args.probe or DEFAULT_PROBE
        inputs = _probe(n, t, as_system(build_model(args.model)).input_size, args.seed)
    if not args.quiet:
        print(f"{PROG}: reading the checkpoints in {folder} in training order", file=sys.stderr)
    tl = timeline(folder, args.model, inputs, seed=args.seed, progress=not args.quiet)
    good = [c for c, e in zip(tl.checkpoints, tl.errors, strict=True) if e is None]
    if not good:
        raise CommandError(f"no checkpoint in {str(folder)!r} could be read and loaded: "
                           f"{tl.errors[0]}")
    if not args.quiet:
        for c, e in zip(tl.checkpoints, tl.errors, strict=True):
            if e is not None:
                print(f"note: {c}: left out of the timeline: {e}", file=sys.stderr)
    return tl, inputs, str(folder / good[-1])


def _cmd_report(args: argparse.Namespace) -> int:
    which = _analyses(args.analyses)
    out = _output_paths(args.output, args.force)
    if args.front and not args.inputs:
        raise CommandError("--front needs --inputs: the raw inputs (token ids or features) the "
                           "front end turns into the recurrent part's inputs")
    # before the slow part
    inputs = load_inputs(args.inputs, raw=bool(args.front)) if args.inputs else None
    over, inputs, weights = _report_weights(args, inputs)
    names = _run_names(args, weights)
    context = _context(args)
    runs: dict[str, Any] = {}
    for name, w in zip(names, weights, strict=True):
        runs[name] = _user_run(args, w, quiet=args.quiet)
    inputs, source = _report_inputs(args, inputs, over, _checked_input_size(runs))
    options, trace = _user_options(args, runs, inputs)
    path = _run_report(runs, inputs, out=out, which=which, seed=args.seed,
                       keep_going=args.keep_going, quiet=args.quiet, title=args.title,
                       source=source, options=options, trace=trace, context=context,
                       timeline={names[0]: over} if over is not None else None)
    print(path)
    return 0


def _report_weights(args: argparse.Namespace, inputs: Any) -> tuple[Any, Any, list]:
    """The timeline over the checkpoints (or None), the inputs and the weights files to report;
    names the run of ``--checkpoints`` when no ``--names`` were given."""
    if args.checkpoints is None:
        return None, inputs, list(args.weights)
    load_factory(args.model)  # a clear message for a bad --model before any work
    if args.names is not None and len(args.names) != 1:
        raise CommandError("--checkpoints is one run: give one name with --names")
    over, inputs, last = _checkpoint_timeline(args, inputs)
    if args.names is None:
        args.names = [Path(args.checkpoints).resolve().name or Path(last).stem]
    return over, inputs, [last]


def _run_names(args: argparse.Namespace, weights: list) -> list[str]:
    """One distinct run name per weights file: ``--names`` or the files' stems."""
    if args.names is not None:
        if len(args.names) != len(weights):
            raise CommandError(f"--names has {len(args.names)} names for {len(weights)} weights "
                               "files; give one name per file")
        names = list(args.names)
    else:
        names = [Path(w).stem for w in weights]
    if len(set(names)) != len(names):
        raise CommandError(f"run names must be distinct, got {', '.join(names)}; pass --names")
    return names


def _checked_input_size(runs: dict[str, Any]) -> int | None:
    """The input size the given inputs must have, or None when a front end of the user's
    reads them."""
    from .._core.record import as_system
    from .._core.systems import LowerLayers

    first = as_system(next(iter(runs.values())))
    if isinstance(first.front, LowerLayers):  # one layer of a stack: the module's own inputs
        return first.front.stack.input_size
    if first.front is not None:
        return None  # a front end of the user's: its raw inputs are not checked here
    return first.input_size


def _report_inputs(args: argparse.Namespace, inputs: Any, over: Any,
                   input_size: int | None) -> tuple[Any, str]:
    """The inputs of the report (a built-in probe when none were given) and their source."""
    if inputs is None or (over is not None and not args.inputs):
        n, t = args.probe or DEFAULT_PROBE
        if inputs is None:
            inputs = _probe(n, t, input_size, args.seed)
        source = (f"built-in probe: i.i.d. standard-normal inputs, {n} x {t} steps, "
                  f"seed {args.seed}")
    else:
        if input_size is not None and inputs.shape[-1] != input_size:
            raise CommandError(
                f"inputs in {args.inputs!r} have {inputs.shape[-1]} features but the model "
                f"expects {input_size}; pass an array of shape (B, T, {input_size})")
        source = f"read from {args.inputs}"
    return inputs, source


def demo_runs(task: str = "sorting_line") -> dict[str, Any]:
    """The shipped example runs of one example task, name -> trained model."""
    try:
        from .. import examples
    except ImportError as err:
        raise CommandError(f"the example models are not available ({err}); install hiddenlens "
                           "from its source tree") from err
    runs = {}
    for name in examples.list_runs(task=f"hiddenlens.examples.{task}"):
        try:
            runs[name] = examples.load_run(name)
        except FileNotFoundError as err:
            raise CommandError(str(err)) from err
    if not runs:
        raise CommandError(f"no {task} example run is shipped with hiddenlens.examples")
    return runs


def _demo_task(runs: dict[str, Any]) -> dict[str, dict[str, Any]]:
    """The shipped runs' task metrics (from their training record), for the diagnosis."""
    from .. import examples

    task = {}
    for name in runs:
        try:
            task[name] = examples.task_metrics(name)
        except (KeyError, OSError, ValueError):
            continue  # a run without a record is diagnosed from its figures alone
    return task


def _cmd_demo(args: argparse.Namespace) -> int:
    import importlib

    from .. import examples

    which = _analyses(args.analyses)
    out = _output_paths(args.output, args.force)
    task_name = getattr(args, "task", "sorting_line")
    runs = demo_runs(task_name)
    module = importlib.import_module(f"hiddenlens.examples.{task_name}")
    n, t = DEMO_PROBE if task_name == "sorting_line" else DEMO_DAYS
    inputs = module.make_inputs(n, t, seed=args.seed)
    what = ("sorting-line task inputs (tag flashes, gate cues, belt vibration)"
            if task_name == "sorting_line" else
            "greenhouse task inputs (sunlight, vent opening, heater power)")
    source = f"{what}, {n} x {t} steps, seed {args.seed}"
    # the task variable on trials of their own: the tag colour from its flash (no gate cue,
    # so the tag must be kept to the end), or the weather of a calm day from its sunset
    trials = examples.task_trials(next(iter(runs)), DEMO_TRIALS[0], seed=args.seed)
    source += f"; task-variable memory on {trials.description}"
    # the PCA is fitted on the same trials and draws the mean trajectory of each value of the
    # task variable, aligned to its onset
    source += "; the PCA trajectories on the same trials (the mean of each value, aligned)"
    task = _demo_task(runs)
    title = ("hiddenlens demo: sorting-line runs compared" if task_name == "sorting_line" else
             "hiddenlens demo: the greenhouse LSTM")
    path = _run_report(runs, inputs, out=out, which=which, seed=args.seed,
                       keep_going=args.keep_going, quiet=args.quiet, title=title,
                       source=source, options={"task_memory": {"inputs": trials.inputs},
                                "pca": {"inputs": trials.inputs}},
                       context={"targets": trials.targets, "onsets": trials.onsets},
                       task=task)
    print(path)
    return 0


# ---------------------------------------------------------------------- entry point
def main(argv: Sequence[str] | None = None) -> int:
    """Run the ``hiddenlens`` command; returns the exit status (0 on success)."""
    parser = build_parser()
    args = parser.parse_args(argv)
    if args.command is None:
        parser.print_help(sys.stderr)
        return 2
    threads = None
    if args.threads is not None:
        import torch

        threads = torch.get_num_threads()
        torch.set_num_threads(args.threads)
    try:
        if args.command == "report":
            return _cmd_report(args)
        if args.command == "timeline":
            return _cmd_timeline(args)
        return _cmd_demo(args)
    except KeyboardInterrupt:
        print(f"{PROG}: interrupted; no report written", file=sys.stderr)
        return 130
    except (CommandError, ValueError, TypeError, OSError, KeyError, RuntimeError) as err:
        msg = " ".join(str(err).split()) or type(err).__name__
        if not isinstance(err, CommandError):
            msg = f"{type(err).__name__}: {msg}"
        print(f"{PROG}: error: {msg}", file=sys.stderr)
        return 1
    finally:
        if threads is not None:  # main() may be called in a longer-lived process
            import torch

            torch.set_num_threads(threads)


if __name__ == "__main__":  # pragma: no cover
    sys.exit(main())

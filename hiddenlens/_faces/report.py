"""One self-contained HTML report (figures inlined as PNG) plus a JSON file of the key figures.

The page is built from plain strings with every piece of text escaped; it references nothing
outside itself (no scripts, fonts or images from the network), so it opens offline, in CI
artefacts and attached to a lab log.
"""

from __future__ import annotations

import base64
import datetime as _dt
import html
import io
import json
import math
import os
import sys
from collections.abc import Iterable, Mapping
from pathlib import Path
from typing import Any

import numpy as np

from .._analyses.bootstrap import FigureIntervals, figure_intervals, within_noise
from .._analyses.compare import RunComparison, plot_cka, plot_overlay
from .._analyses.diagnosis import Diagnosis, describe_figure, diagnose
from .._analyses.figures import (
    array_summaries,
    describe_inputs,
    figure_rows,
    format_delta,
    format_figure,
    key_figures,
    summary_sentence,
)
from .._analyses.runner import AnalysisResults
from .._core.registry import AnalysisSpec, analyses, registered
from .._core.validation import optional_mapping
from .._plotting.style import name_titles, no_mathtext
from .._version import __version__

__all__ = ["write_report", "report_data", "GENERAL_CAUTIONS"]

FORMAT = "hiddenlens-report"
FORMAT_VERSION = 1

#: Cautions printed in every report, whatever the analyses.
GENERAL_CAUTIONS: tuple[str, ...] = (
    "Finite-time Lyapunov exponents and Jacobian spectra of an input-driven network depend on "
    "the input statistics and the number of steps: they describe the network on these inputs.",
    "Linear decoding gives a lower bound on memory: the state may hold more than a linear "
    "readout recovers, and the span threshold is a convention.",
    "Fixed points depend on the chosen constant input (zero unless stated); slow points are not "
    "fixed points.",
    "The gradient verdict (vanishing / near-isometric / exploding) is a heuristic read off a "
    "fitted rate, not a proof about training.",
    "PCA axes are comparable only in one basis: trajectories of different runs are drawn in "
    "their own axes here, so compare their variance spectra, not the pictures' orientation.",
    "CKA compares the runs' representations on the given inputs only.",
)

_CSS = """
body{font-family:system-ui,-apple-system,'Segoe UI',sans-serif;margin:2em auto;max-width:1100px;
color:#222;line-height:1.45;padding:0 1em}
h1{font-size:1.6em;margin-bottom:.2em}h2{border-bottom:1px solid #ccc;padding-bottom:.2em;
margin-top:1.8em}h3{margin-bottom:.3em}
.meta{color:#666;font-size:.9em}.caution{background:#fff8e5;border-left:4px solid #e0a800;
padding:.4em .8em;font-size:.92em}.note{background:#eef3fb;border-left:4px solid #4a78c2;
padding:.4em .8em}
table{border-collapse:collapse;font-size:.9em;margin:.6em 0}
th,td{border:1px solid #ddd;padding:.25em .6em;text-align:right}
th{background:#f3f3f3}td.text,th.text{text-align:left}
figure{display:inline-block;margin:.4em;vertical-align:top}
figure img{max-width:100%;height:auto;border:1px solid #eee}
figcaption{font-size:.85em;color:#555;text-align:center}
nav.toc{background:#f7f7f7;padding:.4em 1em;font-size:.92em}nav.toc ul{margin:.2em 0}
.level-ok{color:#0072B2}.level-marginal{color:#E69F00}.level-failing{color:#D55E00}
.level-unknown{color:#555}
code{background:#f4f4f4;padding:0 .2em}
"""


# ---------------------------------------------------------------------- figures
def _png(draw, *, figsize=(6.4, 4.0), projection: str | None = None,
         left: float = 0.15) -> str:
    """Run ``draw(ax)`` on a fresh Agg figure and return it as a base64 PNG string."""
    return _encode(_figure(draw, figsize=figsize, projection=projection, left=left))


def _figure(draw, *, figsize=(6.4, 4.0), projection: str | None = None, left: float = 0.15):
    """A fresh Agg figure with ``draw(ax)`` done on its one Axes."""
    from matplotlib.figure import Figure

    fig = Figure(figsize=figsize, dpi=80)
    # fixed margins: an automatic layout costs a second full draw of every figure
    fig.subplots_adjust(left=left, right=0.95, bottom=0.14, top=0.9)
    ax = fig.add_subplot(projection=projection)
    draw(ax)
    no_mathtext(fig)  # names come from users: never parse them as mathtext
    return fig


def _encode(fig) -> str:
    buf = io.BytesIO()
    fig.savefig(buf, format="png", metadata={"Software": None})
    return base64.b64encode(buf.getvalue()).decode("ascii")


def _share_y(per_run: list[list[tuple[str, Any]]]) -> None:
    """One y-range for the i-th figure of every run (2-D plots on the same scale), so that a
    row of runs' figures reads as one comparison."""
    for row in zip(*per_run, strict=False):
        axes = [fig.axes[0] for _, fig in row if fig.axes]
        if len(axes) < 2 or any(getattr(ax, "name", "") != "rectilinear" for ax in axes) \
                or len({ax.get_yscale() for ax in axes}) != 1 \
                or len({ax.get_ylabel() for ax in axes}) != 1:
            continue
        lims = np.array([ax.get_ylim() for ax in axes], dtype=float)  # (runs, 2)
        if not np.all(np.isfinite(lims)):
            continue
        flipped = lims[0, 0] > lims[0, 1]
        lo, hi = lims.min(), lims.max()
        for ax in axes:
            ax.set_ylim((hi, lo) if flipped else (lo, hi))


def _result_figs(spec: AnalysisSpec, result: Any, run: Mapping[str, Any], *,
                 extras: bool = True, name: str | None = None) -> list[tuple[str, Any]]:
    """The figures of one result as (caption, Figure) pairs, drawn as its spec says."""
    out = []
    trace = getattr(run, "trace", None)
    cls = trace.metadata.get("model_class") if trace is not None else None
    for d in spec.drawings(result, run, extras=extras):
        size = (6.4, 5.0) if d.projection == "3d" else (6.4, 4.0)

        def draw(ax, d=d):  # titles name the run, not the model's class
            d.draw(ax)
            name_titles(ax, cls, name)

        out.append((d.caption, _figure(draw, projection=d.projection, figsize=size)))
    return out


def _result_pngs(spec: AnalysisSpec, result: Any, run: Mapping[str, Any], *,
                 extras: bool = True, name: str | None = None) -> list[tuple[str, str]]:
    """The figures of one result as (caption, base64 PNG) pairs, drawn as its spec says.

    ``extras=False`` keeps only the main plots (a comparison shows the rest as overlays).
    """
    return [(c, _encode(f)) for c, f in _result_figs(spec, result, run, extras=extras,
                                                       name=name)]


def _setting(spec: AnalysisSpec, results: Mapping[str, Any]) -> str:
    """How an analysis was set up, in words (what its cautions depend on); '' if unknown."""
    try:
        return spec.setting(results)
    except (AttributeError, TypeError, ValueError):
        return ""


def _img(b64: str, caption: str, alt: str | None = None) -> str:
    alt = html.escape(alt or caption, quote=True)
    return (f'<figure><img src="data:image/png;base64,{b64}" alt="{alt}">'
            f"<figcaption>{html.escape(caption)}</figcaption></figure>")


def _result_alt(spec: AnalysisSpec, result: Any, label: str) -> str:
    """Alt text for a figure of one result: its label and the result's key figures in words."""
    try:
        figs = key_figures({spec.name: result})
    except (AttributeError, TypeError, ValueError, KeyError):
        figs = {}
    limit = figs.get("memory_max_lag")
    said = []
    for k, v in figs.items():
        if k == "memory_max_lag":
            continue
        try:
            said.append(describe_figure(k, v, limit=limit))
        except (TypeError, ValueError):
            said.append(f"{k.replace('_', ' ')} {format_figure(k, v)}")
    return f"Figure: {label}" + (" \u2014 " + "; ".join(said) if said else "")


def _close_stray_pyplot_figures(before: set[int]) -> None:
    plt = sys.modules.get("matplotlib.pyplot")
    if plt is not None:
        for num in set(plt.get_fignums()) - before:
            plt.close(num)


# ---------------------------------------------------------------------- JSON
def _jsonable(v: Any) -> Any:
    """JSON-ready copy: numpy -> Python; NaN/inf -> "nan"/"inf"/"-inf" (valid JSON)."""
    if isinstance(v, Mapping):
        return {str(k): _jsonable(x) for k, x in v.items()}
    if isinstance(v, (list, tuple)):
        return [_jsonable(x) for x in v]
    if isinstance(v, np.ndarray) or hasattr(v, "detach"):
        return _jsonable(np.asarray(v.detach().cpu() if hasattr(v, "detach") else v).tolist())
    if isinstance(v, (bool, np.bool_)):
        return bool(v)
    if isinstance(v, (int, np.integer)):
        return int(v)
    if isinstance(v, (float, np.floating)):
        return _json_float(float(v))
    return v if v is None or isinstance(v, str) else repr(v)


def _json_float(f: float) -> float | str:
    if math.isnan(f):
        return "nan"
    if math.isinf(f):
        return "inf" if f > 0 else "-inf"
    return f


def _model_info(results: Any) -> dict[str, Any]:
    trace = getattr(results, "trace", None)
    if trace is None:
        return {}
    keys = ("model_class", "kind", "num_layers", "hidden_size", "state_size", "input_size",
            "dtype", "fingerprint")
    return {k: trace.metadata.get(k) for k in keys if k in trace.metadata}


def _as_runs(results_or_runs: Any, name: str) -> tuple[dict[str, Mapping[str, Any]],
                                                         RunComparison | None]:
    if isinstance(results_or_runs, RunComparison):
        comp = results_or_runs
        return {n: comp.results[n] for n in comp.names}, comp
    if isinstance(results_or_runs, AnalysisResults):
        return {name: results_or_runs}, None
    if isinstance(results_or_runs, Mapping):
        if all(k in analyses() for k in results_or_runs):
            return {name: results_or_runs}, None
        if all(isinstance(v, Mapping) for v in results_or_runs.values()):
            return {str(k): v for k, v in results_or_runs.items()}, None
    raise TypeError(
        "write_report takes the results of run_analyses (a mapping analysis name -> result), "
        f"a RunComparison from compare_runs, or a mapping run name -> results; got "
        f"{type(results_or_runs).__name__}"
    )


def report_data(results_or_runs: AnalysisResults | RunComparison
                | Mapping[str, Mapping[str, Any]], *, name: str = "model", title: str | None = None,
                inputs_description: str | None = None) -> dict[str, Any]:
    """The JSON document of a report: key figures, summaries of the main arrays, metadata.

    Returns
    -------
    dict
        ``format``, ``format_version``, ``hiddenlens_version``, ``created``, ``title``,
        ``inputs`` (``description``, ``shape``), ``analyses`` (names shown), ``runs``: per run
        ``model`` (class, kind, sizes, fingerprint), ``summary`` (a sentence),
        ``key_figures``, ``arrays`` (see :func:`hiddenlens._analyses.figures.array_summaries`),
        ``skipped`` (analysis -> reason), ``options``, ``seconds``, ``intervals`` (``level``
        and figure -> [low, high]) where intervals were made; and for several runs
        ``comparison`` with ``names``, ``cka`` (R x R), ``cka_parts`` and ``within_noise``
        (run -> figure -> true / false / null, against the first run). Numbers that are not
        finite are written as the strings ``"nan"``, ``"inf"`` and ``"-inf"``.
    """
    runs, comp = _as_runs(results_or_runs, name)
    first = next(iter(runs.values()))
    trace = getattr(first, "trace", None)
    doc: dict[str, Any] = {
        "format": FORMAT,
        "format_version": FORMAT_VERSION,
        "hiddenlens_version": __version__,
        "created": _dt.datetime.now(_dt.timezone.utc).isoformat(timespec="seconds"),
        "title": title or _default_title(runs),
        "inputs": {
            "description": inputs_description
            or (describe_inputs(trace) if trace is not None else None),
            "shape": list(trace.inputs.shape) if trace is not None else None,
        },
        "analyses": [a for a in analyses() if any(a in r for r in runs.values())],
        "runs": {},
    }
    for n, res in runs.items():
        figs = key_figures(res)
        doc["runs"][n] = {
            "model": _model_info(res),
            "summary": summary_sentence(figs),
            "key_figures": figs,
            "arrays": array_summaries(res),
            "skipped": dict(getattr(res, "skipped", {}) or {}),
            "options": dict(getattr(res, "options", {}) or {}),
            "seconds": dict(getattr(res, "seconds", {}) or {}),
        }
    for n, fi in _run_intervals(runs, comp).items():
        doc["runs"][n]["intervals"] = {"level": fi.level, "figures": {
            f: [fi.low[i], fi.high[i]] for i, f in enumerate(fi.figures)}}
    if comp is not None:
        doc["comparison"] = {"names": list(comp.names), "cka": comp.cka,
                             "cka_parts": comp.cka_parts}
        if comp.intervals:
            doc["comparison"]["within_noise"] = {
                n: {f: comp.noise(f, n) for f in comp.intervals[n].figures
                    if f in comp.intervals[comp.names[0]]} for n in comp.names[1:]}
    return _jsonable(doc)


def _default_title(runs: Mapping[str, Any]) -> str:
    if len(runs) > 1:
        return f"hiddenlens comparison of {len(runs)} runs: {', '.join(runs)}"
    return f"hiddenlens report: {next(iter(runs))}"


# ---------------------------------------------------------------------- HTML
def _esc(v: Any) -> str:
    return html.escape(str(v), quote=True)


def _run_intervals(runs: Mapping[str, Mapping[str, Any]], comp: RunComparison | None
                   ) -> dict[str, FigureIntervals]:
    """The intervals to show: the comparison's, or those of a single run's recording."""
    if comp is not None:
        return dict(comp.intervals or {})
    if len(runs) != 1:
        return {}
    name, res = next(iter(runs.items()))
    if getattr(res, "trace", None) is None:
        return {}
    try:
        return {name: figure_intervals(res)}
    except (TypeError, ValueError, KeyError):
        return {}


def _with_interval(key: str, value: Any, fi: FigureIntervals | None) -> str:
    text = format_figure(key, value)
    if fi is not None and key in fi:
        _, lo, hi = fi[key]
        if math.isfinite(lo) and math.isfinite(hi):
            text += f" [{format_figure(key, lo)}, {format_figure(key, hi)}]"
    return text


def _noise_words(noise: bool | None) -> str:
    if noise is True:
        return " (within noise)"
    if noise is False:
        return " (beyond noise)"
    return ""


def _figures_table(runs: Mapping[str, Mapping[str, Any]],
                   intervals: Mapping[str, FigureIntervals] | None = None) -> str:
    rows = figure_rows({n: key_figures(r) for n, r in runs.items()})
    if not rows:
        return "<p>No key figures: no analysis ran.</p>"
    intervals = intervals or {}
    names = list(runs)
    others = names[1:]
    paired = bool(others) and all(n in intervals for n in names)
    head = ('<tr><th class="text">figure</th>' + "".join(f"<th>{_esc(n)}</th>" for n in names)
            + "".join(f"<th>\u0394 {_esc(n)}</th>" for n in others) + "</tr>")
    body = []
    for fr in rows:
        cells = "".join(
            f"<td>{_esc(_with_interval(fr.key, fr.values[n], intervals.get(n)))}</td>"
            for n in names)
        for n in others:
            text = format_delta(fr.key, fr.deltas[n])
            if paired and fr.numeric and fr.deltas[n] is not None:
                text += _noise_words(within_noise(intervals[names[0]], intervals[n], fr.key))
            cells += f"<td>{_esc(text)}</td>"
        body.append(f'<tr><td class="text">{_esc(fr.text)}</td>{cells}</tr>')
    notes = []
    if others:
        notes.append(f"\u0394 columns: difference from the first run, <b>{_esc(names[0])}</b>.")
    if intervals:
        level = next(iter(intervals.values())).level
        notes.append(
            f"Brackets: {level:.0%} bootstrap intervals over the input sequences (figures of "
            "analyses that draw their own inputs have none unless reruns were asked for).")
        if paired:
            notes.append(
                "A difference is <i>within noise</i> when the paired bootstrap interval of the "
                "difference contains zero, <i>beyond noise</i> when it does not; both speak of "
                "these inputs only, not of another input distribution.")
    note = "".join(f'<p class="meta">{t}</p>' for t in notes)
    return f"<table>{head}{''.join(body)}</table>{note}"


def _cka_table(comp: RunComparison) -> str:
    names = comp.names
    head = "<tr><th></th>" + "".join(f"<th>{_esc(n)}</th>" for n in names) + "</tr>"
    rows = "".join(
        f'<tr><th class="text">{_esc(a)}</th>'
        + "".join(f"<td>{_esc(format_figure('cka', comp.cka[i, j]))}</td>"
                  for j in range(len(names)))
        + "</tr>"
        for i, a in enumerate(names)
    )
    return f"<table>{head}{rows}</table>"


def _option_words(v: Any) -> str:
    if v is None:
        return "automatic"
    if isinstance(v, bool):
        return "yes" if v else "no"
    if isinstance(v, str):
        return v
    if isinstance(v, (list, tuple)):
        return ", ".join(_option_words(x) for x in v) or "none"
    return repr(v) if not isinstance(v, (int, float, np.integer, np.floating)) else f"{v:g}"


def _options_block(runs: Mapping[str, Any]) -> str:
    items = []
    for n, res in runs.items():
        opts = getattr(res, "options", None)
        secs = getattr(res, "seconds", {}) or {}
        if not opts:
            continue
        for a, o in opts.items():
            kw = ", ".join(f"{str(k).replace('_', ' ')} {_option_words(v)}"
                           for k, v in o.items()) or "defaults"
            t = f" ({secs[a]:.2f} s)" if a in secs else ""
            items.append(f"<li>{_esc(n)} \u00b7 {_esc(a)}: {_esc(kw)}{_esc(t)}</li>")
    return f"<ul>{''.join(items)}</ul>" if items else "<p>Defaults.</p>"


def _run_anchor(i: int) -> str:
    # by position: run names come from users and need not make valid ids
    return f"run-{i + 1}"


def _check_task_map(task: Any, runs: Mapping[str, Any]) -> dict[str, Mapping[str, Any]]:
    """``task`` as run name -> metrics; one metrics dict is taken for a single run."""
    task = optional_mapping(task, "task", "run name -> task metrics (accuracy, chance, loss, "
                            "horizon...)")
    names = list(runs)
    if len(names) == 1 and task and not any(k in runs for k in task) \
            and not all(isinstance(v, Mapping) for v in task.values()):
        return {names[0]: task}
    unknown = [str(k) for k in task if k not in runs]
    if unknown:
        raise ValueError(f"task names runs that are not in the report: {', '.join(unknown)}; "
                         f"the runs are {', '.join(names)}")
    bad = [str(k) for k, v in task.items() if v is not None and not isinstance(v, Mapping)]
    if bad:
        raise TypeError(f"task metrics must be mappings (e.g. {{'accuracy': 0.97}}); not so "
                        f"for {', '.join(bad)}")
    return {str(k): v for k, v in task.items() if v is not None}


def _diagnoses(runs: Mapping[str, Mapping[str, Any]], task: Mapping[str, Mapping[str, Any]]
               ) -> dict[str, Diagnosis]:
    """One diagnosis per run, from its key figures, options and task metrics."""
    out = {}
    for n, res in runs.items():
        settings = {a: dict(o) for a, o in (getattr(res, "options", None) or {}).items()
                    if isinstance(o, Mapping)}
        out[n] = diagnose(key_figures(res), task=task.get(n), name=n, settings=settings)
    return out


def _diagnosis_section(diags: Mapping[str, Diagnosis], runs: Mapping[str, Any],
                       has_task: bool) -> str:
    items = []
    for i, (n, d) in enumerate(diags.items()):
        extra = "".join(f'<li class="caution">{_esc(w)}</li>' for w in d.warnings)
        extra += "".join(f"<li>Worth trying: {_esc(t)}</li>" for t in d.suggestions)
        body = d.text[len(f"{n}: "):] if d.text.startswith(f"{n}: ") else d.text
        items.append(
            f'<li id="{_run_anchor(i)}" class="diagnosis"><b>{_esc(n)}</b>: '
            f'<span class="level-{_esc(d.level)}">{_esc(body)}</span>'
            + (f"<ul>{extra}</ul>" if extra else "") + "</li>")
    note = "" if has_task else (
        '<p class="meta">No task metrics were given: the lines read the analyses alone. Pass '
        "the measured accuracy or loss (and the task's horizon) to read them against the "
        "task.</p>")
    return (f'<section id="diagnosis"><h2>Diagnosis</h2><ul>{"".join(items)}</ul>{note}'
            "</section>")


def _toc(entries: Iterable[tuple[str, str]], runs: Iterable[str]) -> str:
    run_links = "".join(f'<li><a href="#{_run_anchor(i)}">{_esc(n)}</a></li>'
                        for i, n in enumerate(runs))
    links = "".join(
        f'<li><a href="#{_esc(anchor)}">{_esc(text)}</a>'
        + (f"<ul>{run_links}</ul>" if anchor == "diagnosis" else "") + "</li>"
        for anchor, text in entries)
    return f'<nav class="toc" aria-label="Contents"><b>Contents</b><ul>{links}</ul></nav>'


def _analysis_section(spec: AnalysisSpec, runs: Mapping[str, Mapping[str, Any]],
                      skipped: Mapping[str, Mapping[str, str]], progress: Any
                      ) -> tuple[list[str], int]:
    """The HTML section of one analysis (nothing if no run has it nor skipped it)."""
    a, multi = spec.name, len(runs) > 1
    why = {n: s[a] for n, s in skipped.items() if a in s}
    present = {n: r[a] for n, r in runs.items() if a in r}
    head = f'<section id="analysis-{_esc(a)}"><h2>{_esc(spec.title)}</h2>'
    if not present:
        if not why:
            return [], 0
        reason = "; ".join(f"{n}: {r}" for n, r in why.items()) if multi else \
            next(iter(why.values()))
        return [f'{head}<p class="note">Skipped \u2014 {_esc(reason)}</p></section>'], 0
    setting = _setting(spec, present)
    out = [head + (f"<p>{_esc(setting)}</p>" if setting else "")
           + (f'<p class="caution">{_esc(spec.caution)}</p>' if spec.caution else "")]
    n_img = 0
    if multi:
        if progress:
            progress(f"figure: {a} (overlay)")
        out.append(_img(_png(lambda ax: plot_overlay(a, present, ax=ax)),
                        f"{spec.title}: all runs",
                        f"Figure: {spec.title} of the runs {', '.join(present)} drawn "
                        "together, one line style and marker per run"))
        n_img += 1
    figs = {}
    for n, res in present.items():
        if progress:
            progress(f"figure: {a} ({n})" if multi else f"figure: {a}")
        figs[n] = _result_figs(spec, res, runs[n], extras=not multi, name=n)
    if multi:
        _share_y(list(figs.values()))
    for n, res in present.items():
        for caption, fig in figs[n]:
            b64 = _encode(fig)
            n_img += 1
            label = " \u00b7 ".join(c for c in ((n if multi else spec.title), caption) if c)
            out.append(_img(b64, label, _result_alt(spec, res, label)))
    out += [f'<p class="note">{_esc(n)}: skipped \u2014 {_esc(r)}</p>' for n, r in why.items()]
    out.append("</section>")
    return out, n_img


def _check_timelines(timeline: Any, runs: Mapping[str, Any]) -> dict[str, Any]:
    """``timeline`` as run name -> Timeline (one Timeline, Monitor or table: the first run's)."""
    from .._training.timeline import timelines_by_run

    return timelines_by_run(timeline, runs, name="timeline", where="in the report")


def _timeline_section(timelines: Mapping[str, Any], multi: bool) -> str:
    from .timeline_report import timeline_section

    parts = ['<section id="over-training"><h2>Over training</h2>']
    for n, tl in timelines.items():
        where = (f"{len(tl.checkpoints)} checks from step {int(tl.x[0])} to {int(tl.x[-1])}"
                 if len(tl.checkpoints) else "no checks")
        parts.append((f"<h3>{_esc(n)}</h3>" if multi or len(timelines) > 1 else "")
                     + f"<p>Key figures of <b>{_esc(n)}</b> against training step: {where}; "
                     "bands are the intervals recorded at each check.</p>")
        parts.append(timeline_section(tl, heading=4 if multi or len(timelines) > 1 else 3))
    parts.append("</section>")
    return "".join(parts)


def _build_html(runs: Mapping[str, Mapping[str, Any]], comp: RunComparison | None, *,
                title: str, inputs_description: str | None, notes: Iterable[str],
                progress: Any, task: Mapping[str, Mapping[str, Any]] | None = None,
                timelines: Mapping[str, Any] | None = None) -> tuple[str, int]:
    names = list(runs)
    multi = len(names) > 1
    skipped = {n: dict(getattr(r, "skipped", {}) or {}) for n, r in runs.items()}
    n_img = 0
    out = [
        "<!DOCTYPE html>",
        '<html lang="en"><head><meta charset="utf-8">',
        '<meta name="viewport" content="width=device-width, initial-scale=1">',
        f"<title>{_esc(title)}</title><style>{_CSS}</style></head><body>",
        f"<h1>{_esc(title)}</h1>",
        f'<p class="meta">hiddenlens {_esc(__version__)} \u00b7 written '
        f"{_esc(_dt.datetime.now().astimezone().isoformat(timespec='seconds'))}</p>",
    ]
    task = task or {}
    diags = _diagnoses(runs, task)
    toc_at = len(out)
    # diagnosis first
    out.append(_diagnosis_section(diags, runs, bool(task)))
    # summary
    out.append('<section id="summary"><h2>Summary</h2><ul>')
    for n, res in runs.items():
        sentence = summary_sentence(key_figures(res)) or "no key figures"
        info = _model_info(res)
        model = ""
        if info:
            model = (f" <span class=\"meta\">({_esc(info.get('model_class', ''))}, "
                     f"{_esc(info.get('kind', ''))}, {_esc(info.get('state_size', ''))} "
                     "states)</span>")
        out.append(f"<li><b>{_esc(n)}</b>{model}: {_esc(sentence)}</li>")
    out.append("</ul>")
    for note in notes:
        out.append(f'<p class="note">{_esc(note)}</p>')
    out.append("</section>")
    # inputs
    if inputs_description is None:
        tr = getattr(next(iter(runs.values())), "trace", None)
        inputs_description = describe_inputs(tr) if tr is not None else "not recorded"
    out.append('<section id="inputs"><h2>Inputs</h2>'
               f"<p>{_esc(inputs_description)}</p>"
               + ("<p>Every run was analysed on these same inputs.</p>" if multi else "")
               + "</section>")
    # key figures
    out.append('<section id="key-figures"><h2>Key figures</h2>'
               f"{_figures_table(runs, _run_intervals(runs, comp))}</section>")
    # similarity
    if comp is not None and multi:
        width = max(len(n) for n in comp.names)
        b64 = _png(lambda ax: plot_cka(comp.cka, comp.names, ax=ax), figsize=(6.0, 4.8),
                   left=min(0.45, 0.06 + 0.016 * width))
        n_img += 1
        parts = ("top-layer hidden states" if comp.cka_parts == "output"
                 else "whole flat states")
        out.append(
            '<section id="similarity"><h2>Representational similarity (linear CKA)</h2>'
            f"<p>Linear CKA (Kornblith et al. 2019) between the runs' {parts} on the shared "
            "inputs, one example per (sequence, step): 1 means equal up to rotation and "
            "scale.</p>"
            f'<p class="caution">{_esc(GENERAL_CAUTIONS[-1])}</p>'
            f"{_cka_table(comp)}"
            + _img(b64, "linear CKA between runs",
                   "Figure: heatmap of linear CKA between the runs " + ", ".join(comp.names)
                   + "; the values are in the table above")
            + "</section>"
        )
    # over training
    if timelines:
        out.append(_timeline_section(timelines, multi))
    # analyses
    for spec in registered():
        section, n = _analysis_section(spec, runs, skipped, progress)
        out += section
        n_img += n
    # cautions and options
    out.append('<section id="cautions"><h2>Reading these numbers with care</h2><ul>'
               + "".join(f"<li>{_esc(c)}</li>" for c in GENERAL_CAUTIONS[: -1 if not multi
                                                                          else None])
               + "</ul></section>")
    out.append(f'<section id="options"><h2>Options used</h2>{_options_block(runs)}</section>')
    entries = [("diagnosis", "Diagnosis"), ("summary", "Summary"), ("inputs", "Inputs"),
               ("key-figures", "Key figures")]
    if comp is not None and multi:
        entries.append(("similarity", "Representational similarity"))
    if timelines:
        entries.append(("over-training", "Over training"))
    entries += [(f"analysis-{spec.name}", spec.title) for spec in registered()
                if any(f'<section id="analysis-{_esc(spec.name)}">' in o for o in out)]
    entries += [("cautions", "Reading these numbers with care"), ("options", "Options used")]
    out.insert(toc_at, _toc(entries, names))
    out.append("</body></html>")
    return "\n".join(out), n_img


def write_report(
    results_or_runs: AnalysisResults | RunComparison | Mapping[str, Mapping[str, Any]],
    path: str | os.PathLike,
    *,
    title: str | None = None,
    name: str = "model",
    inputs_description: str | None = None,
    notes: Iterable[str] = (),
    json_path: str | os.PathLike | bool = True,
    progress: Any = None,
    task: Mapping[str, Mapping[str, Any]] | None = None,
    timeline: Any = None,
) -> Path:
    """Write a self-contained HTML report and (by default) a JSON file of its figures.

    Parameters
    ----------
    results_or_runs : mapping or RunComparison
        The results of :func:`hiddenlens.run_analyses` for one model (a mapping
        analysis name -> result); a :class:`RunComparison` from :func:`hiddenlens.compare_runs`
        (adds the comparison table, CKA and overlay plots); or a mapping run name -> results.
    path : str or PathLike
        The HTML file to write (parent folders are created).
    title : str, optional
        Page title; default names the run(s).
    name : str, default "model"
        Name of the single run when ``results_or_runs`` holds one model's results.
    inputs_description : str, optional
        What the inputs are (shown in the report and the JSON); default: their shape and
        per-feature statistics.
    notes : iterable of str
        Extra paragraphs shown under the summary.
    json_path : str, PathLike or bool, default True
        Where to write the JSON figures (see :func:`report_data`): True for the HTML path with
        the suffix ``.json``, False for none.
    progress : callable, optional
        Called with a short message before each figure is drawn.
    task : Mapping[str, Mapping], optional
        Run name -> task metrics the user measured (``accuracy``, ``chance``, ``loss``,
        ``r2``, ``n_eval``, ``horizon``: see :func:`hiddenlens._analyses.diagnosis.diagnose`); for a
        single run one metrics mapping may be given directly. The diagnosis at the top of the
        page reads each run's figures against them.
    timeline : Timeline, Monitor, DataFrame or Mapping, optional
        Key figures over training (from :func:`hiddenlens.timeline`, a
        :class:`hiddenlens.Monitor` or its ``.timeline`` table) shown in an "Over training"
        section: one chart per figure against step, with its interval band, and a table. One
        timeline belongs to the first run; a mapping gives run name -> timeline.

    Returns
    -------
    pathlib.Path
        The HTML file written.

    Notes
    -----
    Figures are PNG images drawn with matplotlib's Agg renderer and embedded as base64 data;
    the page loads nothing from the network. Every text shown is HTML-escaped.
    """
    runs, comp = _as_runs(results_or_runs, name)
    task_map = _check_task_map(task, runs)
    timelines = _check_timelines(timeline, runs)
    path = Path(path)
    if path.is_dir():
        raise ValueError(f"path {str(path)!r} is a folder; pass the report's file name, e.g. "
                         f"{str(path / 'report.html')!r}")
    if isinstance(notes, str):
        notes = [notes]
    elif isinstance(notes, Iterable):
        notes = list(notes)
    if not isinstance(notes, list) or not all(isinstance(n, str) for n in notes):
        raise TypeError(f"notes must be a str or an iterable of str (one paragraph each), got "
                        f"{type(notes).__name__}")
    title = title or _default_title(runs)
    plt = sys.modules.get("matplotlib.pyplot")
    before = set(plt.get_fignums()) if plt is not None else set()
    try:
        page, _ = _build_html(runs, comp, title=title, inputs_description=inputs_description,
                              notes=list(notes),
                              progress=progress, task=task_map, timelines=timelines)
    finally:
        _close_stray_pyplot_figures(before)
    path.parent.mkdir(parents=True, exist_ok=True)
    _atomic_write(path, page)
    if json_path:
        jp = path.with_suffix(".json") if json_path is True else Path(json_path)
        doc = report_data(results_or_runs, name=name, title=title,
                          inputs_description=inputs_description)
        for n, d in _diagnoses(runs, task_map).items():
            doc["runs"][n]["diagnosis"] = _jsonable(d.to_dict())
        for n, tl in timelines.items():
            doc["runs"][n]["timeline"] = _jsonable(
                {"level": tl.level, "rows": tl.table.to_dict(orient="records")})
        _atomic_write(jp, json.dumps(doc, indent=1, ensure_ascii=False) + "\n")
    return path


def _atomic_write(path: Path, text: str) -> None:
    # write next to the target and rename, so an interrupted run never leaves half a file;
    # mkstemp opens a fresh name with O_EXCL, so a planted symlink is never followed
    import tempfile

    fd, tmp = tempfile.mkstemp(dir=path.parent, prefix=f".{path.name}.", suffix=".partial")
    try:
        with os.fdopen(fd, "w", encoding="utf-8") as fh:
            fh.write(text)
        os.replace(tmp, path)
    finally:
        if os.path.lexists(tmp):
            os.unlink(tmp)

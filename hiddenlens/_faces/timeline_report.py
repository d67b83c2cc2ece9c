"""A self-contained HTML page of a checkpoint timeline: one inline SVG chart per figure."""

from __future__ import annotations

import html
import math
import os
from pathlib import Path
from typing import Any

import numpy as np

__all__ = ["write_timeline_page", "timeline_section", "CAUTION"]

CAUTION = ("Figures are finite-time estimates on one fixed probe batch; the bands are "
            "bootstrap intervals over its sequences and do not cover a change of input "
            "distribution. Exponents and rates of a model in training change with the inputs "
            "as well as with the weights.")


def _svg(x: np.ndarray, v: np.ndarray, lo: np.ndarray, hi: np.ndarray) -> str:
    W, H, P = 520, 160, 30
    ok = np.isfinite(v)
    if not ok.any():
        return "<p>no finite values</p>"
    ys = np.concatenate([v[ok], lo[np.isfinite(lo)], hi[np.isfinite(hi)]])
    y0, y1 = float(ys.min()), float(ys.max())
    if y1 - y0 < 1e-12:
        y0, y1 = y0 - 1.0, y1 + 1.0
    x0, x1 = float(x.min()), float(x.max()) if x.max() > x.min() else float(x.min()) + 1.0

    def px(a: float) -> float:
        return P + (a - x0) / (x1 - x0) * (W - 2 * P)

    def py(a: float) -> float:
        return H - P - (a - y0) / (y1 - y0) * (H - 2 * P)

    parts = [f'<svg xmlns="http://www.w3.org/2000/svg" width="{W}" height="{H}">',
             f'<rect x="0" y="0" width="{W}" height="{H}" fill="white"/>']
    band = [(px(a), py(b)) for a, b in zip(x, hi, strict=True) if math.isfinite(b)]
    band += [(px(a), py(b)) for a, b in zip(x[::-1], lo[::-1], strict=True) if math.isfinite(b)]
    if len(band) > 2:
        pts = " ".join(f"{a:.1f},{b:.1f}" for a, b in band)
        parts.append(f'<polygon points="{pts}" fill="#9ecae1" opacity="0.5"/>')
    line = " ".join(f"{px(a):.1f},{py(b):.1f}" for a, b in zip(x[ok], v[ok], strict=True))
    parts.append(f'<polyline points="{line}" fill="none" stroke="#08519c" stroke-width="2"/>')
    for a, b in zip(x[ok], v[ok], strict=True):
        parts.append(f'<circle cx="{px(a):.1f}" cy="{py(b):.1f}" r="3" fill="#08519c"/>')
    parts.append(f'<text x="{P}" y="{H - 8}" font-size="10">{x0:g}</text>'
                 f'<text x="{W - P}" y="{H - 8}" font-size="10" text-anchor="end">{x1:g}</text>'
                 f'<text x="2" y="{py(y1) + 4:.1f}" font-size="10">{y1:.3g}</text>'
                 f'<text x="2" y="{py(y0) + 4:.1f}" font-size="10">{y0:.3g}</text></svg>')
    return "".join(parts)


def timeline_section(result: Any, *, heading: int = 2) -> str:
    """The caution, one chart per figure and the table of ``result`` (a Timeline), as HTML.

    ``heading`` is the level of the figures' headings (2 on the page of its own, 3 inside a
    section of the main report).
    """
    from .summary import FIGURES, format_figure

    e = html.escape
    x = np.asarray(result.x, dtype=float)
    body = [f'<p class="caution">{e(CAUTION)}</p>']
    for j, f in enumerate(result.figures):
        label = FIGURES.get(f, (f,))[0]
        body.append(f"<h{heading}>{e(label)} <small>({e(f)}, {result.level:.0%} band)</small>"
                    f"</h{heading}>")
        body.append(_svg(x, result.values[:, j], result.low[:, j], result.high[:, j]))
    head = "".join(f"<th>{e(c)}</th>" for c in ["checkpoint", "step", *result.figures, "error"])
    rows = []
    for i, name in enumerate(result.checkpoints):
        cells = [e(name), str(int(x[i]))]
        for j, f in enumerate(result.figures):
            v, lo, hi = result.values[i, j], result.low[i, j], result.high[i, j]
            cells.append(e(f"{format_figure(f, v)} [{format_figure(f, lo)}, "
                           f"{format_figure(f, hi)}]"))
        cells.append(e(result.errors[i] or ""))
        rows.append("<tr>" + "".join(f"<td>{c}</td>" for c in cells) + "</tr>")
    body.append(f"<table><tr>{head}</tr>{''.join(rows)}</table>")
    return "".join(body)


def write_timeline_page(result: Any, path: str | os.PathLike, *, title: str = "Over training",
                        source: str = "") -> Path:
    """Write ``result`` (a :class:`hiddenlens.Timeline`) as one HTML file; returns its path."""
    p = Path(path)
    if p.suffix != ".html":
        p = p / "timeline.html"
    p.parent.mkdir(parents=True, exist_ok=True)
    e = html.escape
    body = [f"<h1>{e(title)}</h1>"]
    if source:
        body.append(f"<p>{e(source)}</p>")
    body.append(timeline_section(result, heading=2))
    style = ("body{font-family:sans-serif;max-width:900px;margin:2em auto}"
             "table{border-collapse:collapse;font-size:12px}td,th{border:1px solid #ccc;"
             "padding:2px 6px}.caution{background:#fff5e6;padding:6px}")
    doc = (f'<!DOCTYPE html><html><head><meta charset="utf-8"><title>{e(title)}</title>'
           f"<style>{style}</style></head><body>{''.join(body)}</body></html>")
    p.write_text(doc, encoding="utf-8")
    return p

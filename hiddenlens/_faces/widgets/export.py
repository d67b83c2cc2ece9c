"""Export for the widgets: figures as PNG and SVG, the key-figure table as CSV, download
links built from them, and alt text for figures. The byte-producing functions are plain
(testable without a browser); only :func:`download_link` and :func:`download_row` build widgets."""

from __future__ import annotations

import base64
import csv
import html
import io
import math
import re
from collections.abc import Mapping
from typing import Any

__all__ = [
    "alt_text",
    "download_link",
    "download_row",
    "figure_png",
    "figure_svg",
    "link_html",
    "safe_filename",
    "table_csv",
]

_MIME = {"png": "image/png", "svg": "image/svg+xml", "csv": "text/csv"}

# result class -> analysis name of hiddenlens._faces.summary.key_figures
_ANALYSIS_OF = {
    "JacobianSpectra": "spectra",
    "GradientFlow": "gradient_flow",
    "LyapunovSpectrum": "lyapunov",
    "PCATrajectories": "pca",
    "FixedPoints": "fixed_points",
    "MemoryCurve": "memory",
}


def safe_filename(name: Any, ext: str) -> str:
    """``name`` reduced to letters, digits, ``.``, ``-`` and ``_`` (others become ``-``),
    with extension ``ext``; ``"figure"`` when nothing is left."""
    if not isinstance(ext, str) or not re.fullmatch(r"[a-z0-9]+", ext):
        raise ValueError(f"ext must be a lower-case extension such as 'png', got {ext!r}")
    stem = re.sub(r"[^A-Za-z0-9._-]+", "-", str(name)).strip("-.") or "figure"
    return f"{stem[:120]}.{ext}"


def _check_figure(fig: Any) -> None:
    if not hasattr(fig, "savefig"):
        raise TypeError(f"fig must be a matplotlib Figure (it has .savefig), got "
                        f"{type(fig).__name__}; pass ax.figure for an Axes")


def _save(fig: Any, fmt: str, **kw: Any) -> bytes:
    _check_figure(fig)
    buf = io.BytesIO()
    if getattr(fig, "canvas", None) is None or type(fig.canvas).__name__ == "FigureCanvasBase":
        from matplotlib.backends.backend_agg import FigureCanvasAgg

        FigureCanvasAgg(fig)
    # no creation date or software tag: the same figure gives the same bytes
    meta = {"Software": None} if fmt == "png" else {"Date": None, "Creator": None}
    fig.savefig(buf, format=fmt, metadata=meta, **kw)
    return buf.getvalue()


def figure_png(fig: Any, name: str = "figure", *, dpi: float = 150) -> tuple[bytes, str]:
    """PNG bytes of ``fig`` at ``dpi`` and a file name from ``name``."""
    if isinstance(dpi, bool) or not isinstance(dpi, (int, float)) or not 10 <= dpi <= 1200:
        raise ValueError(f"dpi must be a number between 10 and 1200, got {dpi!r}")
    return _save(fig, "png", dpi=dpi), safe_filename(name, "png")


def figure_svg(fig: Any, name: str = "figure") -> tuple[bytes, str]:
    """SVG bytes of ``fig`` (text kept as text where matplotlib allows) and a file name."""
    return _save(fig, "svg"), safe_filename(name, "svg")


def _cell(value: Any) -> str:
    if value is None:
        return ""
    if isinstance(value, float):
        if math.isnan(value):
            return "NaN"
        if math.isinf(value):
            return "inf" if value > 0 else "-inf"
        return repr(value)
    return str(value)


def table_csv(figures: Mapping[str, Any], name: str = "key-figures") -> tuple[bytes, str]:
    """The key-figure table as UTF-8 CSV: one row per run and figure.

    Parameters
    ----------
    figures : Mapping
        Either one run's key figures (figure key -> value) or run name -> key figures.
    name : str
        File name stem.

    Returns
    -------
    (bytes, str)
        Columns ``run, figure, term, value``; values in full precision (``repr``), NaN and
        infinities spelled ``NaN`` / ``inf`` / ``-inf`` as pandas reads them.
    """
    from ..._analyses.diagnosis import TERMS

    if not isinstance(figures, Mapping):
        raise TypeError("figures must be a mapping: key figures, or run name -> key figures; "
                        f"got {type(figures).__name__}")
    nested = bool(figures) and all(isinstance(v, Mapping) for v in figures.values())
    runs = figures if nested else {"": figures}
    buf = io.StringIO()
    w = csv.writer(buf, lineterminator="\n")
    w.writerow(["run", "figure", "term", "value"])
    for run, figs in runs.items():
        for key, value in figs.items():
            w.writerow([run, key, TERMS.get(key, str(key).replace("_", " ")), _cell(value)])
    return buf.getvalue().encode("utf-8"), safe_filename(name, "csv")


def _data_uri(data: bytes, filename: str) -> str:
    ext = filename.rsplit(".", 1)[-1]
    mime = _MIME.get(ext, "application/octet-stream")
    return f"data:{mime};base64,{base64.b64encode(data).decode('ascii')}"


def link_html(data: bytes, filename: str, label: str | None = None) -> str:
    """An HTML anchor that downloads ``data`` as ``filename`` (a data: URI), styled as a button."""
    if not isinstance(data, (bytes, bytearray)):
        raise TypeError(f"data must be bytes, got {type(data).__name__}")
    text = html.escape(label or f"Download {filename}")
    return (f'<a download="{html.escape(filename)}" href="{_data_uri(bytes(data), filename)}" '
            f'class="jupyter-button" role="button" title="{text}" aria-label="{text}" '
            'style="text-decoration:none;padding:2px 8px;display:inline-block">'
            f"{text}</a>")


def download_link(data: bytes, filename: str, label: str | None = None):
    """An ``ipywidgets.HTML`` download control for ``data`` saved as ``filename``."""
    import ipywidgets as widgets

    return widgets.HTML(link_html(data, filename, label))


def download_row(fig: Any = None, figures: Mapping[str, Any] | None = None,
                 name: str = "figure"):
    """An ``ipywidgets.HBox`` with PNG and SVG downloads of ``fig`` and a CSV download of
    ``figures`` (each only where given)."""
    import ipywidgets as widgets

    items = []
    if fig is not None:
        items.append(download_link(*figure_png(fig, name), "PNG"))
        items.append(download_link(*figure_svg(fig, name), "SVG"))
    if figures is not None:
        items.append(download_link(*table_csv(figures, f"{name}-key-figures"), "table (CSV)"))
    return widgets.HBox(items, layout=widgets.Layout(flex_flow="row wrap"))


def _figure_words(fig: Any) -> str:
    parts = []
    for ax in fig.axes:
        title = ax.get_title() or ax.get_title("left")
        bits = [f"plot {title!r}" if title else "plot"]
        xl, yl = ax.get_xlabel(), ax.get_ylabel()
        if xl:
            bits.append(f"x axis {xl}")
        if yl:
            bits.append(f"y axis {yl}")
        n = len(ax.get_lines())
        if n:
            bits.append(f"{n} line{'s' if n != 1 else ''}")
        parts.append(", ".join(bits))
    return "; ".join(parts)


def alt_text(result: Any, *, name: str | None = None) -> str:
    """Alt text for a figure: what it shows and its key figures in words.

    Parameters
    ----------
    result : analysis result or matplotlib Figure
        A result of one of the analyses (its key figures are described), or a Figure (its
        axes titles, labels and line counts are described).
    name : str, optional
        Run name to start with.
    """
    from ..._analyses.diagnosis import describe_figure
    from .. import summary as _summary

    head = f"{name}: " if name else ""
    if hasattr(result, "savefig") and hasattr(result, "axes"):
        words = _figure_words(result)
        return head + (words or "empty figure")
    analysis = _ANALYSIS_OF.get(type(result).__name__)
    if analysis is None:
        raise TypeError(f"alt_text needs an analysis result ({', '.join(_ANALYSIS_OF)}) or a "
                        f"matplotlib Figure, got {type(result).__name__}")
    figs = _summary.key_figures({analysis: result})
    limit = figs.get("memory_max_lag")
    said = [describe_figure(k, v, limit=limit) for k, v in figs.items() if k != "memory_max_lag"]
    title = getattr(_summary, "TITLES", {}).get(analysis, analysis.replace("_", " "))
    return head + title + (": " + "; ".join(said) if said else "")

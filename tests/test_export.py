"""Widget export: PNG/SVG/CSV bytes, download controls and alt text, in plain pytest."""

from __future__ import annotations

import base64
import csv
import io
import math
import xml.etree.ElementTree as ET

import numpy as np
import pytest
from matplotlib.figure import Figure

from hiddenlens._faces.widgets import export as E


def _figure():
    fig = Figure(figsize=(3, 2))
    ax = fig.add_subplot()
    ax.plot(np.arange(5), np.arange(5) ** 2)
    ax.set_title("gru: memory")
    ax.set_xlabel("lag (steps)")
    ax.set_ylabel("score")
    return fig


def test_png_is_a_png_of_the_requested_size():
    data, name = E.figure_png(_figure(), "gru memory/1", dpi=100)
    # PNG signature and IHDR width/height (PNG specification, ISO/IEC 15948, section 5.2 and 11.2.2)
    assert data[:8] == b"\x89PNG\r\n\x1a\n"
    w, h = int.from_bytes(data[16:20], "big"), int.from_bytes(data[20:24], "big")
    assert (w, h) == (300, 200)
    assert name == "gru-memory-1.png"
    assert E.figure_png(_figure(), dpi=100)[0] == data  # repeatable bytes (no date stamp)
    with pytest.raises(ValueError, match="dpi"):
        E.figure_png(_figure(), dpi=0)
    with pytest.raises(TypeError, match="Figure"):
        E.figure_png("not a figure")


def test_svg_parses_as_svg():
    data, name = E.figure_svg(_figure(), "gru")
    root = ET.fromstring(data)  # reference parser: the standard library's ElementTree
    assert root.tag.endswith("svg") and name == "gru.svg"


def test_csv_round_trips_through_the_csv_module_and_pandas():
    figs = {"gru": {"memory_span": 12.0, "gradient_rate": -0.0622, "lyapunov_max": math.nan,
                    "gradient_verdict": "vanishing"},
            "rnn-gain2.0": {"gradient_half_life": math.inf, "fixed_points_stable": 3}}
    data, name = E.table_csv(figs)
    rows = list(csv.DictReader(io.StringIO(data.decode("utf-8"))))
    assert name == "key-figures.csv" and len(rows) == 6
    assert rows[1] == {"run": "gru", "figure": "gradient_rate", "term": "gradient decay rate",
                       "value": repr(-0.0622)}
    pd = pytest.importorskip("pandas")
    frame = pd.read_csv(io.BytesIO(data))
    vals = dict(zip(frame["figure"], frame["value"], strict=True))
    assert float(vals["gradient_rate"]) == -0.0622
    assert math.isnan(float(vals["lyapunov_max"])) and float(vals["gradient_half_life"]) == math.inf
    single, _ = E.table_csv({"memory_span": 3})
    assert single.decode().splitlines()[1] == ",memory_span,memory span (i.i.d. probe inputs),3"
    with pytest.raises(TypeError, match="figures must be a mapping"):
        E.table_csv([1, 2])


def test_download_link_carries_the_bytes():
    data, name = E.figure_png(_figure(), "gru")
    link = E.download_link(data, name, "PNG")
    value = link.value
    assert f'download="{name}"' in value and ">PNG</a>" in value
    payload = value.split("base64,", 1)[1].split('"', 1)[0]
    assert base64.b64decode(payload) == data
    row = E.download_row(_figure(), {"memory_span": 3}, name="gru")
    assert len(row.children) == 3
    assert "key-figures.csv" in row.children[2].value


def test_safe_filename():
    assert E.safe_filename("  ", "png") == "figure.png"
    assert E.safe_filename("a<b>c", "svg") == "a-b-c.svg"
    with pytest.raises(ValueError, match="ext"):
        E.safe_filename("a", ".PNG")


def test_alt_text_of_a_figure_and_a_result():
    text = E.alt_text(_figure(), name="gru")
    assert text == "gru: plot 'gru: memory', x axis lag (steps), y axis score, 1 line"
    import torch

    import hiddenlens as hl

    model = torch.nn.RNN(3, 4, batch_first=True)
    inputs = torch.randn(2, 30, 3, generator=torch.Generator().manual_seed(0))
    trace = hl.record(model, inputs)
    flow = hl.gradient_flow(model, trace, progress=False)
    words = E.alt_text(flow, name="tiny")
    assert words.startswith("tiny: ") and "gradient" in words
    assert "inf" not in words and "nan" not in words.lower()
    with pytest.raises(TypeError, match="alt_text needs"):
        E.alt_text(object())

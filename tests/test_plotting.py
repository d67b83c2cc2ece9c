"""House plotting style: palette, plain-text labels, colour-by-sample keys, layout, ticks."""

from __future__ import annotations

import matplotlib

matplotlib.use("Agg")

import numpy as np  # noqa: E402
import pytest  # noqa: E402
from matplotlib.colors import to_rgb  # noqa: E402
from matplotlib.figure import Figure  # noqa: E402

from hiddenlens._plotting import style as P  # noqa: E402


def test_okabe_ito_values_as_published():
    # Okabe & Ito (2008), Color Universal Design: the eight colours in RGB (0-255)
    published = {
        "black": (0, 0, 0), "orange": (230, 159, 0), "sky blue": (86, 180, 233),
        "bluish green": (0, 158, 115), "yellow": (240, 228, 66), "blue": (0, 114, 178),
        "vermillion": (213, 94, 0), "reddish purple": (204, 121, 167),
    }
    for name, rgb in published.items():
        assert np.allclose(np.array(to_rgb(P.OKABE_ITO[name])) * 255, rgb, atol=0.5)
    assert len(set(P.RUN_COLORS)) == 8


def _deuteranope(rgb):
    # Viénot, Brettel & Mollon (1999), Color Res. Appl. 24:243: deuteranopia simulated in
    # linear RGB with their published matrix (values quoted from memory of the paper)
    lin = np.where(rgb <= 0.04045, rgb / 12.92, ((rgb + 0.055) / 1.055) ** 2.4)
    m = np.array([[0.29275, 0.70725, 0.0], [0.29275, 0.70725, 0.0], [-0.02234, 0.02234, 1.0]])
    return lin @ m.T


def test_first_four_run_colours_stay_apart_under_deuteranopia():
    sim = [_deuteranope(np.array(to_rgb(c))) for c in P.RUN_COLORS[:4]]
    gaps = [np.linalg.norm(a - b) for i, a in enumerate(sim) for b in sim[i + 1:]]
    # matplotlib's default green and red (C2, C3) for contrast: they nearly merge
    g, r = (_deuteranope(np.array(to_rgb(c))) for c in ("#2ca02c", "#d62728"))
    assert min(gaps) > 2 * np.linalg.norm(g - r)


def test_run_style_differs_without_colour():
    styles = [P.run_style(i, n_points=200) for i in range(8)]
    assert len({repr(s["linestyle"]) for s in styles}) == 8
    assert len({s["marker"] for s in styles}) == 8
    assert styles[0]["markevery"] == 20
    assert P.run_style(8)["color"] == P.run_style(0)["color"]
    with pytest.raises(ValueError, match="run index"):
        P.run_style(-1)


def test_plain_text_is_drawn_literally():
    fig = Figure()
    ax = fig.add_subplot()
    label = "cost $5 $x$ in C:\\runs"
    t = ax.set_title(P.plain_text(label))
    fig.canvas.draw()
    # an escaped dollar is not mathtext: the drawn string equals the input (matplotlib docs,
    # "Text rendering with LaTeX / mathtext": "\$" gives a literal dollar sign)
    drawn, is_math = t._preprocess_math(t.get_text())
    assert is_math is False and drawn == label


def test_get_axes_new_figure_has_constrained_layout_and_palette():
    import matplotlib.pyplot as plt

    ax = P.get_axes()
    try:
        assert ax.figure.get_layout_engine().__class__.__name__ == "ConstrainedLayoutEngine"
        line, = ax.plot([0, 1], [0, 1])
        assert line.get_color() == P.RUN_COLORS[0]
    finally:
        plt.close(ax.figure)
    given = Figure().add_subplot()
    assert P.get_axes(given) is given


def test_keep_labels_inside_after_tick_labels_grow():
    from matplotlib.backends.backend_agg import FigureCanvasAgg

    fig = Figure(figsize=(3, 2), dpi=100)
    FigureCanvasAgg(fig)
    P.keep_labels_inside(fig)
    ax = fig.add_subplot()
    ax.plot([0, 1], [0, 1])
    ax.set_ylabel("state")
    fig.canvas.draw()
    ax.set_yticks([0, 1], ["a long tick label", "b"])  # tick labels grow after a layout
    fig.canvas.draw()
    r = fig.canvas.get_renderer()
    box = ax.yaxis.label.get_window_extent(r)
    assert box.x0 >= 0  # the y label is not clipped at the left edge


def test_thin_ticks_on_small_multiples():
    fig = Figure()
    axes = fig.subplots(2, 3)
    for ax in axes.ravel():
        ax.plot(np.arange(1000), np.arange(1000))
    P.thin_ticks(axes, max_x=3)
    fig.canvas.draw()
    for ax in axes.ravel():
        visible = [t for t in ax.get_xticks() if 0 <= t <= 999]
        assert len(visible) <= 4
    with pytest.raises(ValueError, match="max_x"):
        P.thin_ticks(axes, max_x=0)


def test_color_by_sample_legend_or_colour_bar():
    fig = Figure()
    ax = fig.add_subplot()
    colors = P.color_by_sample(ax, 3, labels=["a", "b$", "c"])
    assert colors == list(P.RUN_COLORS[:3])
    legend = ax.get_legend()
    assert [t.get_text() for t in legend.get_texts()] == ["a", "b\\$", "c"]
    fig2 = Figure()
    ax2 = fig2.add_subplot()
    many = P.color_by_sample(ax2, 20)
    assert len(many) == 20 and len(fig2.axes) == 2  # the colour bar's axes
    with pytest.raises(ValueError, match="labels has 2 entries"):
        P.color_by_sample(ax, 3, labels=["a", "b"])


def test_no_mathtext_keeps_the_log_tick_labels_and_names_plain():
    from matplotlib.backends.backend_agg import FigureCanvasAgg
    from matplotlib.figure import Figure

    from hiddenlens._plotting.style import no_mathtext

    fig = Figure()
    FigureCanvasAgg(fig)
    ax, names = fig.add_subplot(1, 2, 1), fig.add_subplot(1, 2, 2)
    ax.semilogy([1, 2, 3], [1.0, 0.1, 0.01], label="$x")
    ax.set_title("run $a$")
    names.set_xticks([0, 1], ["$\\foo$", "b_$x"])
    no_mathtext(fig)
    fig.canvas.draw()  # a user's "$\foo$" parsed as mathtext would raise here
    # matplotlib's log formatter writes 10^k as mathtext (matplotlib.ticker docs): kept,
    # so the ticks render as powers of ten, not as "$\mathdefault{...}$" source text
    assert all(t.get_parse_math() for t in ax.get_yticklabels())
    assert not ax.title.get_parse_math()
    # drawn as the user wrote them: escaped dollars (matplotlib's mathtext docs: "\\$")
    assert [t.get_text() for t in names.get_xticklabels()] == ["\\$\\foo\\$", "b_\\$x"]


def test_spectra_draw_every_kept_index_or_say_how_many():
    # A top k above ten is drawn whole; a cap on the lines is stated in the title.
    import torch

    import hiddenlens as hl

    gen = torch.Generator().manual_seed(0)
    rnn = torch.nn.RNN(3, 32, batch_first=True)
    x = torch.randn(2, 20, 3, generator=gen)
    result = hl.jacobian_spectra(rnn, hl.record(rnn, x), k=16)
    fig = Figure()
    ax = result.plot(ax=fig.add_subplot())
    singular = [line for line in ax.lines if line.get_linestyle() == "-"]
    assert len(singular) == 16
    assert "drawn" not in ax.get_title()
    fig = Figure()
    ax = result.plot(ax=fig.add_subplot(), max_lines=5)
    assert len([line for line in ax.lines if line.get_linestyle() == "-"]) == 5
    assert "σ1–σ5 of 16 drawn" in ax.get_title()

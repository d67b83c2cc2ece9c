"""The explore and compare widgets in a real browser: JupyterLab on 127.0.0.1 and headless
Chromium, one server and one page for every check of this file.

Proves what the kernel-only tests cannot: the widget JavaScript loads, front end and kernel stay
in sync, the figures drawn in the kernel reach the page, moving a control redraws, downloads
hold the right bytes, tooltips reach the page, and a 900 px window keeps tab titles whole,
figures drawn at the cell's width and the key-figure table scrolling. Nothing is installed or
downloaded at run time; the tests skip (with the reason) only where Chromium, Playwright or
JupyterLab is missing.
"""

from __future__ import annotations

import csv
import io
import re
import time
import xml.etree.ElementTree as ET

import lab
import pytest

pytestmark = [pytest.mark.browser,
              pytest.mark.skipif(lab.CHROMIUM is None,
                                 reason="no chromium binary (apt-get install chromium)")]

PNG_MAGIC = b"\x89PNG\r\n\x1a\n"  # PNG signature (PNG specification, section 5.2)
EXPLORE, COMPARE = 0, 1  # the boards' order on the page


@pytest.fixture(scope="module")
def page(tmp_path_factory):
    """The notebook of tests/lab.py run in JupyterLab, both boards showing their first tab."""
    pytest.importorskip("jupyterlab", reason="jupyterlab is not installed (pip install "
                                             "jupyterlab)")
    sync_api = pytest.importorskip("playwright.sync_api", reason="playwright is not "
                                   "installed (pip install playwright)")
    tmp = tmp_path_factory.mktemp("lab")
    root = tmp / "root"
    root.mkdir()
    lab.board_notebook(root / "boards.ipynb", steps=60, explore=["pca", "lyapunov"],
                       compare=["pca", "lyapunov"])
    t0 = time.monotonic()
    with lab.lab_server(tmp, root) as url, sync_api.sync_playwright() as pw:
        # launch() adds --headless and a fresh temporary --user-data-dir itself
        browser = pw.chromium.launch(executable_path=lab.CHROMIUM, args=lab.CHROMIUM_ARGS,
                                     timeout=60_000)
        try:
            p = browser.new_page(viewport={"width": 1400, "height": 1400},
                                 accept_downloads=True)
            p.set_default_timeout(60_000)
            lab.open_and_run(p, url, "boards.ipynb")
            for b in (EXPLORE, COMPARE):
                lab.wait_image(p, b, "pca", timeout=120_000)
            p.get_by_text("Python 3 (ipykernel) | Idle").wait_for(timeout=120_000)
            yield p
            sync_api.expect(p.get_by_text("Error displaying widget")).to_have_count(0)
            sync_api.expect(p.locator(".hiddenlens-board .hiddenlens-error")).to_have_count(0)
            p.screenshot(path=tmp / "page.png")
        finally:
            browser.close()
    print(f"\nbrowser checks: {time.monotonic() - t0:.1f} s with the server")


def _img(page, b: int, panel: str):
    return lab.board(page, b).locator(f".hiddenlens-panel-{panel} img.widget-image")


def test_diagnosis_line_is_on_the_page(page):
    for b, runs in ((EXPLORE, ["gru"]), (COMPARE, ["gru", "rnn-gain0.5", "rnn-gain2.0"])):
        line = lab.board(page, b).locator(".hiddenlens-diagnosis")
        assert line.is_visible()
        text = line.inner_text()
        assert "Diagnosis" in text and "accuracy" in text
        for n in runs:
            assert f"{n}:" in text
    # the trained GRU solves the task: its line must not call it failing
    gru = lab.board(page, EXPLORE).locator(".hiddenlens-diagnosis").inner_text()
    assert "failing" not in gru


def test_a_view_control_changes_the_figure_on_screen(page):
    img = _img(page, EXPLORE, "pca")
    img.scroll_into_view_if_needed()
    before_src, before_pixels = img.get_attribute("src"), img.screenshot()
    lab.board(page, EXPLORE).locator(".hiddenlens-sample select").select_option(label="3")
    lab.wait_image(page, EXPLORE, "pca", old=before_src)
    page.wait_for_timeout(300)  # let the new image paint before comparing pixels
    assert img.screenshot() != before_pixels, "the figure did not change on screen"
    lab.board(page, EXPLORE).locator(".hiddenlens-sample select").select_option(label="all")


def test_dropdown_and_box_tooltips_reach_the_page(page):
    board = lab.board(page, EXPLORE)
    sample = board.locator(".hiddenlens-sample select")
    assert "redraws only" in (sample.get_attribute("title") or "")
    labels = board.locator(".hiddenlens-label[title]")
    assert labels.count() >= 3  # sample, steps, part at least
    assert any("redraws only" in labels.nth(i).get_attribute("title")
               for i in range(labels.count()))


def _download(page, locator) -> tuple[str, bytes]:
    with page.expect_download() as info:
        locator.click()
    d = info.value
    with open(d.path(), "rb") as fh:
        return d.suggested_filename, fh.read()


def test_figure_and_table_downloads_hold_the_right_content(page):
    board = lab.board(page, EXPLORE)
    export = board.locator(".hiddenlens-panel-pca .hiddenlens-export")
    name, data = _download(page, export.locator("a[download$='.png']"))
    assert name.endswith(".png") and data.startswith(PNG_MAGIC)
    # decoded by matplotlib's PNG reader (reference library): the figure shown on the page
    import matplotlib.image

    h, w = matplotlib.image.imread(io.BytesIO(data), format="png").shape[:2]
    natural = _img(page, EXPLORE, "pca").evaluate("i => [i.naturalHeight, i.naturalWidth]")
    assert [h, w] == natural

    export.locator("button.hiddenlens-svg").click()  # the SVG is drawn on demand
    name, data = _download(page, export.locator("a[download$='.svg']"))
    # an SVG document: root <svg> in the SVG namespace (W3C SVG 1.1, section 5.1), parsed
    # with the standard library's XML parser
    assert name.endswith(".svg")
    assert ET.fromstring(data).tag == "{http://www.w3.org/2000/svg}svg"

    name, data = _download(page, board.locator(".hiddenlens-table-export a"))
    rows = list(csv.DictReader(io.StringIO(data.decode("utf-8"))))  # stdlib CSV reader
    assert name.endswith(".csv") and rows
    pr = float(next(r["value"] for r in rows if r["figure"] == "participation_ratio"))
    # the number in the file is the one the summary strip states (to its 3 digits)
    strip = board.locator(".hiddenlens-summary").inner_text()
    assert f"{pr:.3g}" in strip and 1.0 <= pr <= 32.0


def test_a_900_px_window_keeps_titles_text_and_table_readable(page):
    page.set_viewport_size({"width": 900, "height": 1400})
    for b in (EXPLORE, COMPARE):
        img = _img(page, b, "pca")
        # drawn again at the cell's width: shown at its own size, not shrunk
        page.wait_for_function(
            "i => i.complete && i.naturalWidth > 0"
            " && Math.abs(i.naturalWidth - i.clientWidth) <= 0.06 * i.naturalWidth"
            " && i.naturalWidth < 800", arg=img.element_handle(), timeout=30_000)
        labels = lab.board(page, b).locator(".lm-TabBar-tabLabel")
        clipped = labels.evaluate_all(
            "els => els.filter(e => e.scrollWidth > e.clientWidth + 1"
            " || e.getBoundingClientRect().width < 10).map(e => e.textContent)")
        assert clipped == [], f"tab titles truncated: {clipped}"
    board = lab.board(page, COMPARE)
    board.locator(".lm-TabBar-tab", has_text="Key figures").click()
    scroller = board.locator(".hiddenlens-scroll")
    scroller.wait_for(timeout=60_000)
    box, edge = scroller.evaluate(
        "e => [[e.scrollWidth, e.clientWidth, getComputedStyle(e).overflowX],"
        " e.closest('.hiddenlens-board').getBoundingClientRect().right"
        " - e.getBoundingClientRect().right]")
    scroll_width, client_width, overflow = box
    assert overflow == "auto" and edge >= 0  # inside the board
    assert scroll_width > client_width, "the table fits: the check would prove nothing"
    assert re.search(r"rnn-gain2\.0", scroller.inner_text())
    page.set_viewport_size({"width": 1400, "height": 1400})

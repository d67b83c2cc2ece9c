"""Screenshots of every tab of explore and compare at 1400 and 900 px wide, for a reader to look
at (nothing is asserted). Run from the repository root:

    python tests/screenshots.py OUT_FOLDER [--steps 100] [--widths 1400,900]

writes OUT_FOLDER/<board>-<width>-<tab>.png (board: explore, compare) and the page's full view
of each width. Needs JupyterLab, Playwright and Chromium (see tests/lab.py).
"""

from __future__ import annotations

import argparse
import re
import sys
import tempfile
import time
from pathlib import Path

sys.path.insert(0, str(Path(__file__).resolve().parent))

import lab  # noqa: E402


def _ready(page, b: int, timeout: float = 240_000) -> None:
    """Wait until the visible tab of board ``b`` shows a figure, a table or an error."""
    page.wait_for_function(
        "b => { const root = document.querySelectorAll('.hiddenlens-board')[b];"
        " if (!root) return false;"
        " const tab = [...root.querySelectorAll('.widget-tab-contents > .lm-Widget')]"
        "   .find(e => !e.classList.contains('lm-mod-hidden'));"
        " if (!tab) return false;"
        " if (tab.querySelector('.hiddenlens-error')) return true;"
        " const i = tab.querySelector('img.widget-image');"
        " const busy = /Computing/.test(tab.innerText);"
        " if (tab.querySelector('.hiddenlens-table')) return !busy;"
        " return !busy && i && i.complete && i.naturalWidth > 0"
        "   && getComputedStyle(i).display !== 'none'; }",
        arg=b, timeout=timeout)
    page.wait_for_timeout(400)


def main() -> None:
    ap = argparse.ArgumentParser(description=__doc__.splitlines()[0])
    ap.add_argument("out", type=Path)
    ap.add_argument("--steps", type=int, default=100)
    ap.add_argument("--widths", default="1400,900")
    args = ap.parse_args()
    args.out.mkdir(parents=True, exist_ok=True)
    widths = [int(w) for w in args.widths.split(",")]
    from playwright.sync_api import sync_playwright

    t0 = time.monotonic()
    with tempfile.TemporaryDirectory() as tmp:
        tmp = Path(tmp)
        root = tmp / "root"
        root.mkdir()
        lab.board_notebook(root / "boards.ipynb", steps=args.steps)
        with lab.lab_server(tmp, root) as url, sync_playwright() as pw:
            browser = pw.chromium.launch(executable_path=lab.CHROMIUM, args=lab.CHROMIUM_ARGS)
            try:
                page = browser.new_page(viewport={"width": widths[0], "height": 2200})
                page.set_default_timeout(240_000)
                lab.open_and_run(page, url, "boards.ipynb")
                page.locator(".hiddenlens-board").nth(1).wait_for()
                for width in widths:
                    page.set_viewport_size({"width": width, "height": 2200})
                    page.wait_for_timeout(2000)  # the boards measure the new width, redraw
                    for b, what in ((0, "explore"), (1, "compare")):
                        board = lab.board(page, b)
                        tabs = board.locator(".lm-TabBar-tab")
                        for i in range(tabs.count()):
                            tabs.nth(i).click()
                            _ready(page, b)
                            title = re.sub(r"[^a-z0-9]+", "-", tabs.nth(i).inner_text().lower())
                            board.scroll_into_view_if_needed()
                            path = args.out / f"{what}-{width}-{i}-{title.strip('-')}.png"
                            board.screenshot(path=path)
                            print(f"{path} ({time.monotonic() - t0:.0f} s)", flush=True)
                        tabs.nth(0).click()
                    page.screenshot(path=args.out / f"page-{width}.png")
            finally:
                browser.close()


if __name__ == "__main__":
    main()

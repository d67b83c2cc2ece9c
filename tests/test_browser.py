"""The explore widget in a real browser: JupyterLab on 127.0.0.1 and headless Chromium.

Proves what the kernel-only tests cannot: the widget JavaScript loads, front end and kernel stay
in sync, the figure drawn in the kernel's worker thread reaches the page, and moving a control
redraws it. Nothing is installed or downloaded at run time; the test skips (with the reason)
only where Chromium, Playwright or JupyterLab is missing.
"""

from __future__ import annotations

import json
import os
import shutil
import signal
import socket
import subprocess
import sys
import time
import urllib.request
from pathlib import Path

import pytest

ROOT = Path(__file__).resolve().parents[1]
NOTEBOOK = ROOT / "docs" / "notebooks" / "tour.ipynb"
CHROMIUM = os.environ.get("CHROMIUM") or shutil.which("chromium") or shutil.which(
    "chromium-browser")
# Without these flags Chromium tries to reach the network, which a closed machine refuses.
CHROMIUM_ARGS = ["--no-sandbox", "--disable-gpu", "--disable-quic", "--no-first-run",
                 "--disable-background-networking", "--disable-component-update",
                 "--disable-sync"]
PANEL = ".hiddenlens-panel-pca"  # every check is scoped to the widget's own elements


def _child_pids(pid: int) -> list[int]:
    kids = []
    for stat in Path("/proc").glob("[0-9]*/stat"):
        try:
            if int(stat.read_text().rsplit(")", 1)[1].split()[1]) == pid:
                kids.append(int(stat.parent.name))
        except (OSError, IndexError, ValueError):
            pass
    return kids


@pytest.fixture
def lab_url(tmp_path):
    """JupyterLab on 127.0.0.1:<free port> without a token, isolated settings; stopped by pid."""
    pytest.importorskip("jupyterlab", reason="jupyterlab is not installed (pip install "
                                             "jupyterlab)")
    root = tmp_path / "root"
    root.mkdir()
    shutil.copy(NOTEBOOK, root / NOTEBOOK.name)
    # isolated user settings; also silences the "news" toast that would cover the page
    cfg = tmp_path / ".lab/settings/@jupyterlab/apputils-extension"
    cfg.mkdir(parents=True)
    (cfg / "notification.jupyterlab-settings").write_text(
        json.dumps({"fetchNews": "false", "checkForUpdates": False}))
    with socket.socket() as s:
        s.bind(("127.0.0.1", 0))
        port = s.getsockname()[1]
    path = os.environ.get("PYTHONPATH", "")
    env = dict(os.environ, JUPYTER_CONFIG_DIR=str(tmp_path / ".cfg"),
               JUPYTER_RUNTIME_DIR=str(tmp_path / ".rt"),
               PYTHONPATH=str(ROOT) + (os.pathsep + path if path else ""))
    log = open(tmp_path / "server.log", "wb")  # noqa: SIM115 - closed in the finally below
    proc = subprocess.Popen(
        [sys.executable, "-m", "jupyterlab", "--no-browser", "--ServerApp.ip=127.0.0.1",
         f"--ServerApp.port={port}", "--ServerApp.port_retries=0",
         "--IdentityProvider.token=", "--ServerApp.password=", "--ServerApp.allow_root=True",
         f"--ServerApp.root_dir={root}", f"--LabApp.user_settings_dir={tmp_path}/.lab/settings",
         f"--LabApp.workspaces_dir={tmp_path}/.lab/ws", "--LabApp.news_url=None",
         "--LabApp.extension_manager=readonly",
         "--LabApp.check_for_updates_class=jupyterlab.NeverCheckForUpdate"],
        cwd=root, env=env, stdout=log, stderr=subprocess.STDOUT, start_new_session=True)
    url = f"http://127.0.0.1:{port}"
    try:
        deadline = time.monotonic() + 60
        while True:
            if proc.poll() is not None:
                pytest.fail("jupyter lab exited:\n" + (tmp_path / "server.log").read_text())
            try:
                urllib.request.urlopen(url + "/api/status", timeout=2).close()
                break
            except OSError:
                if time.monotonic() > deadline:
                    pytest.fail("jupyter lab did not answer within 60 s")
                time.sleep(0.2)
        yield url
    finally:
        kernels = _child_pids(proc.pid)
        proc.send_signal(signal.SIGTERM)  # the server shuts its kernels down on SIGTERM
        try:
            proc.wait(timeout=15)
        except subprocess.TimeoutExpired:
            proc.kill()
            proc.wait(timeout=5)
        for pid in kernels:  # safety net: only processes that were children of our server
            try:
                os.kill(pid, signal.SIGKILL)
            except ProcessLookupError:
                pass
        log.close()


@pytest.mark.browser
@pytest.mark.timeout(300)
@pytest.mark.skipif(CHROMIUM is None, reason="no chromium binary (apt-get install chromium)")
def test_explore_widget_renders_and_redraws_in_chromium(lab_url, tmp_path):
    sync_api = pytest.importorskip("playwright.sync_api",
                                   reason="playwright is not installed (pip install playwright)")
    expect = sync_api.expect
    t0 = time.monotonic()
    with sync_api.sync_playwright() as pw:
        # launch() adds --headless and a fresh temporary --user-data-dir itself
        browser = pw.chromium.launch(executable_path=CHROMIUM, args=CHROMIUM_ARGS,
                                     timeout=60_000)
        try:
            page = browser.new_page(viewport={"width": 1280, "height": 1000})
            page.set_default_timeout(60_000)
            page.goto(f"{lab_url}/lab/tree/{NOTEBOOK.name}")
            page.get_by_text("Python 3 (ipykernel) | Idle").wait_for()
            page.get_by_role("menuitem", name="Run", exact=True).click()
            page.get_by_role("menuitem", name="Run All Cells", exact=True).click()

            # the figure inside the widget's own Image (a broken widget manager would show
            # the static HTML copy instead, which has no .widget-image)
            img = page.locator(f"{PANEL} img.widget-image")
            expect(img).to_have_count(1, timeout=180_000)
            page.wait_for_function(
                "sel => { const i = document.querySelector(sel);"
                " return i && i.complete && i.naturalWidth > 0; }",
                arg=f"{PANEL} img.widget-image", timeout=180_000)
            page.get_by_text("Python 3 (ipykernel) | Idle").wait_for(timeout=180_000)
            img.scroll_into_view_if_needed()
            before_src = img.get_attribute("src")
            before_pixels = img.screenshot()

            # a view-only control: pick one sample in the shared "sample" drop-down
            page.locator(".hiddenlens-sample select").select_option(label="3")
            page.wait_for_function(
                "([sel, old]) => { const i = document.querySelector(sel);"
                " return i && i.src !== old && i.complete && i.naturalWidth > 0; }",
                arg=[f"{PANEL} img.widget-image", before_src], timeout=60_000)
            page.wait_for_timeout(300)  # let the new image paint before comparing pixels
            assert img.screenshot() != before_pixels, "the figure did not change on screen"

            expect(page.get_by_text("Error displaying widget")).to_have_count(0)
            expect(page.get_by_text("Loading widget")).to_have_count(0)
            expect(page.locator(".hiddenlens-board .hiddenlens-error")).to_have_count(0)
            expect(page.locator(".hiddenlens-board .hiddenlens-summary")).to_have_count(1)
            board = page.locator(".hiddenlens-board")
            board.scroll_into_view_if_needed()
            shot = tmp_path / "explore.png"
            page.screenshot(path=shot, full_page=False)
            board.screenshot(path=tmp_path / "explore-widget.png")
            assert shot.stat().st_size > 10_000
        finally:
            browser.close()
    print(f"browser test: {time.monotonic() - t0:.1f} s after the server answered")

"""JupyterLab on 127.0.0.1 and headless Chromium for the widget checks in a real browser.

Used by tests/test_browser.py and by tests/screenshots.py. Nothing is installed or downloaded:
the system's Chromium is driven by Playwright, the server runs with isolated settings and is
stopped by its own pid (and only its own children are killed as a safety net).
"""

from __future__ import annotations

import contextlib
import json
import os
import shutil
import signal
import socket
import subprocess
import sys
import time
import urllib.request
from collections.abc import Iterator
from pathlib import Path

ROOT = Path(__file__).resolve().parents[1]
CHROMIUM = os.environ.get("CHROMIUM") or shutil.which("chromium") or shutil.which(
    "chromium-browser")
# Without these flags Chromium tries to reach the network, which a closed machine refuses.
CHROMIUM_ARGS = ["--no-sandbox", "--disable-gpu", "--disable-quic", "--no-first-run",
                 "--disable-background-networking", "--disable-component-update",
                 "--disable-sync"]

#: The notebook both the test and the screenshot script run: the shipped sorting-line runs
#: with their task metrics, on short inputs so that the whole check stays quick.
SETUP = """\
import hiddenlens
from hiddenlens.examples import load_run, sorting_line, task_metrics
names = ["gru", "rnn-gain0.5", "rnn-gain1.0", "rnn-gain2.0"]
models = {{n: load_run(n) for n in names}}
inputs = sorting_line.make_inputs(6, {steps}, seed=0)  # (B, T, I)
"""
EXPLORE = """\
ex = hiddenlens.explore(models["gru"], inputs, name="gru", task=task_metrics("gru"),
                        analyses={analyses})
ex"""
COMPARE = """\
cmp = hiddenlens.compare(models, inputs, task={{n: task_metrics(n) for n in names}},
                         analyses={analyses})
cmp"""


def make_notebook(path: Path, *cells: str) -> Path:
    import nbformat

    nb = nbformat.v4.new_notebook(cells=[nbformat.v4.new_code_cell(c) for c in cells])
    nb.metadata["kernelspec"] = {"name": "python3", "display_name": "Python 3 (ipykernel)",
                                 "language": "python"}
    nbformat.write(nb, path)
    return path


def board_notebook(path: Path, *, steps: int = 60, explore: list[str] | None = None,
                   compare: list[str] | None = None) -> Path:
    """A notebook that opens an explorer of the GRU and a comparison of four runs."""
    return make_notebook(path, SETUP.format(steps=steps),
                         EXPLORE.format(analyses=explore), COMPARE.format(analyses=compare))


def _child_pids(pid: int) -> list[int]:
    kids = []
    for stat in Path("/proc").glob("[0-9]*/stat"):
        try:
            if int(stat.read_text().rsplit(")", 1)[1].split()[1]) == pid:
                kids.append(int(stat.parent.name))
        except (OSError, IndexError, ValueError):
            pass
    return kids


@contextlib.contextmanager
def lab_server(tmp: Path, root: Path) -> Iterator[str]:
    """JupyterLab serving ``root`` on a free port without a token; yields its URL."""
    cfg = tmp / ".lab/settings/@jupyterlab/apputils-extension"
    cfg.mkdir(parents=True, exist_ok=True)
    # isolated user settings; also silences the "news" toast that would cover the page
    (cfg / "notification.jupyterlab-settings").write_text(
        json.dumps({"fetchNews": "false", "checkForUpdates": False}))
    with socket.socket() as s:
        s.bind(("127.0.0.1", 0))
        port = s.getsockname()[1]
    path = os.environ.get("PYTHONPATH", "")
    env = dict(os.environ, JUPYTER_CONFIG_DIR=str(tmp / ".cfg"),
               JUPYTER_RUNTIME_DIR=str(tmp / ".rt"), MPLBACKEND="Agg",
               PYTHONPATH=str(ROOT) + (os.pathsep + path if path else ""))
    log_path = tmp / "server.log"
    with open(log_path, "wb") as log:
        proc = subprocess.Popen(
            [sys.executable, "-m", "jupyterlab", "--no-browser", "--ServerApp.ip=127.0.0.1",
             f"--ServerApp.port={port}", "--ServerApp.port_retries=0",
             "--IdentityProvider.token=", "--ServerApp.password=",
             "--ServerApp.allow_root=True", f"--ServerApp.root_dir={root}",
             f"--LabApp.user_settings_dir={tmp}/.lab/settings",
             f"--LabApp.workspaces_dir={tmp}/.lab/ws", "--LabApp.news_url=None",
             "--LabApp.extension_manager=readonly",
             "--LabApp.check_for_updates_class=jupyterlab.NeverCheckForUpdate"],
            cwd=root, env=env, stdout=log, stderr=subprocess.STDOUT, start_new_session=True)
        url = f"http://127.0.0.1:{port}"
        try:
            deadline = time.monotonic() + 60
            while True:
                if proc.poll() is not None:
                    raise RuntimeError("jupyter lab exited:\n" + log_path.read_text())
                try:
                    urllib.request.urlopen(url + "/api/status", timeout=2).close()
                    break
                except OSError:
                    if time.monotonic() > deadline:
                        raise RuntimeError("jupyter lab did not answer within 60 s") from None
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
                with contextlib.suppress(ProcessLookupError):
                    os.kill(pid, signal.SIGKILL)


def open_and_run(page, url: str, name: str) -> None:
    """Open notebook ``name``, close the file browser (more room) and run every cell."""
    page.goto(f"{url}/lab/tree/{name}")
    page.get_by_text("Python 3 (ipykernel) | Idle").wait_for()
    page.get_by_role("menuitem", name="Run", exact=True).click()
    page.get_by_role("menuitem", name="Run All Cells", exact=True).click()


def board(page, index: int):
    """The ``index``-th hiddenlens board on the page (0: the explorer, 1: the comparison)."""
    return page.locator(".hiddenlens-board").nth(index)


def wait_image(page, board_index: int, panel: str, old: str | None = None,
               timeout: float = 120_000) -> str:
    """Wait until the figure of ``panel`` in board ``board_index`` is loaded (and differs from
    ``old``); returns its src."""
    page.wait_for_function(
        "([b, sel, old]) => { const root = document.querySelectorAll('.hiddenlens-board')[b];"
        " const i = root && root.querySelector(sel);"
        " return i && i.complete && i.naturalWidth > 0 && i.src !== old"
        " && getComputedStyle(i).display !== 'none'; }",
        arg=[board_index, f".hiddenlens-panel-{panel} img.widget-image", old or ""],
        timeout=timeout)
    return board(page, board_index).locator(
        f".hiddenlens-panel-{panel} img.widget-image").get_attribute("src")

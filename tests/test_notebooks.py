"""Execute the example notebooks in docs/notebooks with a real kernel (nbclient, no browser).

Proves that the kernel-side code runs top to bottom, that the widgets draw into their Image
models from the worker thread, and that the saved notebook embeds the widget state (PNG bytes
included) and the static HTML copy for front ends without widgets.
"""

from __future__ import annotations

import base64
import os
import queue
import time
from pathlib import Path

import pytest

nbformat = pytest.importorskip("nbformat")
pytest.importorskip("nbclient")
pytest.importorskip("ipykernel")

ROOT = Path(__file__).resolve().parents[1]
NOTEBOOKS = sorted((ROOT / "docs" / "notebooks").glob("*.ipynb"))
WIDGET_STATE = "application/vnd.jupyter.widget-state+json"
WIDGET_VIEW = "application/vnd.jupyter.widget-view+json"
PNG_MAGIC = b"\x89PNG\r\n\x1a\n"  # PNG signature (PNG specification, section 5.2)


def sliced_shell_client(NotebookClient):
    """A NotebookClient whose shell channel is polled in 0.5 s slices.

    nbclient's Output-widget emulation sends comm messages on the shell socket while it
    awaits execute_reply; now and then the reply's wake-up is lost and the cell stalls until its
    timeout (jupyter/nbclient#312). Polling in slices turns that stall into <= 0.5 s.
    """

    class Client(NotebookClient):
        async def async_start_new_kernel_client(self):
            kc = await super().async_start_new_kernel_client()
            get_msg = kc.shell_channel.get_msg

            async def sliced_get_msg(timeout=None):
                end = None if timeout is None else time.monotonic() + timeout
                while True:
                    step = 0.5 if end is None else max(0.0, min(0.5, end - time.monotonic()))
                    try:
                        return await get_msg(timeout=step)
                    except queue.Empty:
                        if end is not None and time.monotonic() >= end:
                            raise

            kc.shell_channel.get_msg = sliced_get_msg
            return kc

    return Client


def kernel_env(monkeypatch) -> None:
    """Let the kernel import hiddenlens and hiddenlens.examples from this checkout."""
    path = os.environ.get("PYTHONPATH", "")
    monkeypatch.setenv("PYTHONPATH", str(ROOT) + (os.pathsep + path if path else ""))


def test_there_are_example_notebooks():
    assert {p.name for p in NOTEBOOKS} >= {"tour.ipynb", "compare_runs.ipynb"}


@pytest.mark.slow
@pytest.mark.timeout(420)
@pytest.mark.parametrize("path", NOTEBOOKS, ids=[p.stem for p in NOTEBOOKS])
def test_notebook_executes_and_embeds_widget_state(path, tmp_path, monkeypatch):
    from nbclient import NotebookClient

    kernel_env(monkeypatch)
    nb = nbformat.read(path, as_version=4)
    client = sliced_shell_client(NotebookClient)(
        nb, timeout=240, kernel_name="python3", store_widget_state=True,
        resources={"metadata": {"path": str(tmp_path)}})
    client.execute()  # raises CellExecutionError with the traceback if a cell fails
    nbformat.write(nb, tmp_path / path.name)

    outputs = [o for c in nb.cells if c.cell_type == "code" for o in c.get("outputs", [])]
    assert not [o for o in outputs if o.get("output_type") == "error"]
    shown = [o for o in outputs if WIDGET_VIEW in o.get("data", {})]
    assert len(shown) == 1, "each notebook displays one hiddenlens widget"
    # the static copy travels beside the widget view, for renderers without widgets
    assert "hiddenlens-summary" in shown[0]["data"]["text/html"]

    state = nb.metadata["widgets"][WIDGET_STATE]["state"]
    images = [m for m in state.values() if m["model_name"] == "ImageModel"]
    pngs = [base64.b64decode(b["data"]) for m in images for b in m.get("buffers", [])
            if b.get("path") == ["value"]]
    assert any(p.startswith(PNG_MAGIC) for p in pngs), "no figure was drawn into the widget"
    errors = [m["state"].get("value", "") for m in state.values()
              if m["model_name"] == "HTMLModel"]
    assert not [e for e in errors if "hiddenlens-error" in e], errors

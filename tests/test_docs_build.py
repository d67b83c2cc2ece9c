"""The documentation site builds with warnings as errors (skipped without the docs extra)."""

from __future__ import annotations

import re
import subprocess
import sys
from pathlib import Path

import pytest

ROOT = Path(__file__).resolve().parents[1]


def test_docs_pages_are_in_the_nav_and_linked():
    config = (ROOT / "mkdocs.yml").read_text()
    for page in ("diagnosis.md", "api.md", "index.md"):
        assert page in config
    assert "diagnosis.md" in (ROOT / "docs" / "index.md").read_text()
    # every ::: target of the API page names an existing module path
    targets = re.findall(r"^::: (\S+)$", (ROOT / "docs" / "api.md").read_text(), re.M)
    assert len(targets) > 20
    for target in targets:
        parts = target.split(".")
        # the module part of the path: the longest prefix that is a file (or a package)
        assert any(ROOT.joinpath(*parts[:i]).with_suffix(".py").is_file()
                   or (ROOT.joinpath(*parts[:i]) / "__init__.py").is_file()
                   for i in range(2, len(parts) + 1)), target


def test_every_public_name_has_its_entry_in_the_api_page():
    import hiddenlens

    text = (ROOT / "docs" / "api.md").read_text()
    named = {t.rsplit(".", 1)[-1] for t in re.findall(r"^::: (\S+)$", text, re.M)}
    missing = [n for n in hiddenlens.__all__ if n != "__version__" and n not in named]
    assert missing == [], f"add '::: hiddenlens.<module>.<name>' lines to docs/api.md for {missing}"


def test_ci_builds_the_docs_strictly():
    ci = (ROOT / ".ci" / "run").read_text()
    assert 'pip install -e ".[docs]"' in ci and "mkdocs build --strict" in ci


@pytest.mark.slow
def test_site_builds_strict(tmp_path):
    pytest.importorskip("mkdocs", reason="the docs extra is not installed (pip install -e .[docs])")
    pytest.importorskip("mkdocstrings", reason="the docs extra is not installed")
    pytest.importorskip("nbconvert", reason="the docs extra is not installed")
    out = subprocess.run(
        [sys.executable, "-m", "mkdocs", "build", "--strict", "--site-dir", str(tmp_path)],
        cwd=ROOT, capture_output=True, text=True, timeout=300,
    )
    assert out.returncode == 0, out.stderr[-3000:]
    assert (tmp_path / "api.html").read_text().count("doc-heading") > 20
    tour = (tmp_path / "notebooks" / "tour.html").read_text()
    assert "not re-run when the site is built" in tour
    assert "Diagnosis line" in (tmp_path / "diagnosis.html").read_text()

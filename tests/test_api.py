"""The public surface: every exported name resolves, and unknown names fail clearly."""

import subprocess
import sys

import pytest

import hiddenlens as hl


@pytest.mark.parametrize("name", sorted(set(hl.__all__) - {"__version__"}))
def test_public_name_resolves(name):
    assert getattr(hl, name) is not None


def test_unknown_name_raises_attribute_error():
    with pytest.raises(AttributeError, match="no attribute 'nonexistent'"):
        hl.nonexistent  # noqa: B018


def test_version_matches_package_metadata():
    from importlib.metadata import version

    assert hl.__version__ == version("hiddenlens")


def test_import_is_light():
    code = ("import sys, hiddenlens; "
            "print(sorted(m for m in ('matplotlib', 'ipywidgets', 'sklearn', 'pandas') "
            "if m in sys.modules))")
    out = subprocess.run([sys.executable, "-c", code], capture_output=True, text=True, check=True)
    assert out.stdout.strip() == "[]"

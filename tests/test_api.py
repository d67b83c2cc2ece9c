"""The public surface: every exported name resolves, and unknown names fail clearly."""

import pytest

import hiddenlens as hl
from tests.conftest import heavy_modules_after


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
    loaded = heavy_modules_after("hiddenlens", ("matplotlib", "ipywidgets", "sklearn", "pandas"))
    assert loaded == "[]"

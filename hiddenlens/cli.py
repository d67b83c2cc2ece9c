"""The ``hiddenlens`` command (its code lives in the faces layer, ``hiddenlens._faces.cli``)."""

from ._faces.cli import main

__all__ = ["main"]

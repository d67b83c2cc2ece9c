"""Load saved weights into a model: plain state_dicts, nested checkpoints and key prefixes.

Files are read with ``torch.load(..., weights_only=True)``, so a checkpoint runs no code.
"""

from __future__ import annotations

import copy
import os
from collections.abc import Mapping
from dataclasses import dataclass
from typing import Any

import torch
from torch import nn

__all__ = ["LoadedWeights", "load_weights", "read_state_dict"]

# keys under which training scripts commonly nest the weights (common practice)
_NESTED_KEYS = ("state_dict", "model_state_dict", "model", "net", "network", "weights")
_PREFIXES = ("module.", "model.", "_orig_mod.", "net.", "network.")


@dataclass(frozen=True)
class LoadedWeights:
    """A copy of the model carrying the loaded weights, and what was found in the file.

    Attributes
    ----------
    model : nn.Module
        A deep copy of the model given, with the weights loaded (the original is untouched).
    nested_key : str or None
        The checkpoint key the state_dict was found under (e.g. ``"state_dict"``).
    prefix : str
        The prefix stripped from every key (``""`` when none).
    extra_keys : tuple of str
        Keys of the checkpoint the model has no place for (a readout trained beside it, ...).
    """

    model: nn.Module
    nested_key: str | None
    prefix: str
    extra_keys: tuple[str, ...]


def read_state_dict(source: Any) -> tuple[dict[str, torch.Tensor], str | None]:
    """The tensors of a checkpoint (a path or a mapping) and the key they were nested under."""
    if isinstance(source, (str, os.PathLike)):
        path = os.fspath(source)
        if not os.path.exists(path):
            raise FileNotFoundError(f"weights file {path!r} not found")
        if path.endswith(".npz"):
            raise ValueError(
                f"{path!r} is a NumPy .npz archive, not a PyTorch checkpoint; weights are read "
                "with torch.load (save them with torch.save(model.state_dict(), 'weights.pt')). "
                "A hiddenlens trace (.npz) is read with hiddenlens.load_trace")
        try:
            obj = torch.load(path, map_location="cpu", weights_only=True)
        except Exception as err:  # noqa: BLE001 - unpickling refusals come in many types
            raise ValueError(
                f"cannot read weights from {path!r} as a PyTorch checkpoint with "
                "weights_only=True "
                f"({type(err).__name__}: {str(err).splitlines()[0] if str(err) else ''}); save "
                "the weights alone with torch.save(model.state_dict(), path)") from None
    else:
        obj = source
    if not isinstance(obj, Mapping):
        raise TypeError(f"a checkpoint must hold a state_dict (a mapping of names to tensors), "
                        f"got {type(obj).__name__}")
    nested = None
    if not any(isinstance(v, torch.Tensor) for v in obj.values()):
        for key in _NESTED_KEYS:
            if isinstance(obj.get(key), Mapping):
                nested, obj = key, obj[key]
                break
        else:
            keys = ", ".join(map(repr, list(obj)[:10]))
            raise ValueError(f"the checkpoint holds no tensors at its top level and none of the "
                             f"keys {_NESTED_KEYS}; its keys: {keys}. Pass the state_dict itself")
    tensors = {str(k): v for k, v in obj.items() if isinstance(v, torch.Tensor)}
    if not tensors:
        raise ValueError("the checkpoint's state_dict holds no tensors")
    return tensors, nested


def _strip_prefix(keys: set[str], state: dict[str, torch.Tensor]
                  ) -> tuple[dict[str, torch.Tensor], str]:
    """Remove repeated known prefixes while that makes more keys match the model's."""
    prefix = ""
    while True:
        hits = len(keys & set(state))
        for p in _PREFIXES:
            if all(k.startswith(p) for k in state):
                stripped = {k[len(p):]: v for k, v in state.items()}
                if len(keys & set(stripped)) > hits:
                    state, prefix = stripped, prefix + p
                    break
        else:
            return state, prefix


def load_weights(model: nn.Module, source: Any, *, strict_shapes: bool = True) -> LoadedWeights:
    """Load a checkpoint into a copy of ``model``.

    Parameters
    ----------
    model : nn.Module
        The model (or cell) the weights belong to, freshly built; it is deep-copied, never
        changed.
    source : str, PathLike or Mapping
        A file written by ``torch.save`` (read with ``weights_only=True``) or a loaded mapping:
        a plain state_dict, or a checkpoint nesting it under ``"state_dict"``,
        ``"model_state_dict"``, ``"model"``, ``"net"``, ``"network"`` or ``"weights"``. Keys
        prefixed ``module.`` (DataParallel), ``model.``, ``_orig_mod.`` (torch.compile),
        ``net.`` or ``network.`` are matched without the prefix.
    strict_shapes : bool, default True
        Refuse tensors whose shape differs from the model's.

    Returns
    -------
    LoadedWeights
        ``.model`` the loaded copy; ``.extra_keys`` what the model had no place for.

    Raises
    ------
    ValueError
        When the model has parameters or buffers the checkpoint lacks (named), or shapes differ;
        keys the model lacks are allowed (``extra_keys``) and named in that message too.
    """
    if not isinstance(model, nn.Module):
        raise TypeError(f"model must be a torch nn.Module to load weights into, got "
                        f"{type(model).__name__}; build the model first, then load its weights")
    state, nested = read_state_dict(source)
    own = model.state_dict()
    state, prefix = _strip_prefix(set(own), state)
    missing = [k for k in own if k not in state]
    extra = tuple(k for k in state if k not in own)
    problems = []
    if missing:
        problems.append(f"missing keys {', '.join(missing[:12])}{' ...' * (len(missing) > 12)}")
    if strict_shapes:
        bad = [f"{k} {tuple(state[k].shape)} in the file vs {tuple(v.shape)} in the model"
               for k, v in own.items() if k in state and tuple(state[k].shape) != tuple(v.shape)]
        if bad:
            problems.append(f"shape mismatch: {'; '.join(bad[:6])}")
    if problems:
        if extra:
            problems.append(f"unexpected keys {', '.join(extra[:8])}{' ...' * (len(extra) > 8)} "
                            "(extra keys alone are allowed)")
        raise ValueError(
            f"the checkpoint does not fit the {type(model).__name__}: {'; '.join(problems)}. "
            "Check that the factory builds the model the weights were trained for")
    target = copy.deepcopy(model)
    target.load_state_dict({k: state[k] for k in own}, strict=True)
    return LoadedWeights(model=target, nested_key=nested, prefix=prefix, extra_keys=extra)

"""Atomic, weights-only checkpoints of one student.

A checkpoint holds the unwrapped module's ``state_dict`` (tensors only, on the CPU), so that
``torch.load(..., weights_only=True)`` always reads it and a file carrying pickled code is refused.
Wrappers are removed before saving: ``DistributedDataParallel``/``DataParallel`` (``module.``) and
``torch.compile`` (``_orig_mod.``), so a checkpoint loads into a plain ``model_fn()`` module.
"""

from __future__ import annotations

import os
from collections.abc import Callable
from pathlib import Path

import torch
from torch import nn

from ._io import atomic_write, sha256_file
from .errors import InputError
from .seeding import preserved_rng


class CheckpointError(InputError):
    """A checkpoint is missing, damaged, or not the file that was recorded."""


def unwrap(model: nn.Module) -> nn.Module:
    """Return the module under DDP/DataParallel and ``torch.compile`` wrappers."""
    while True:
        if isinstance(model, (nn.parallel.DistributedDataParallel, nn.DataParallel)):
            model = model.module
        elif hasattr(model, "_orig_mod") and isinstance(model._orig_mod, nn.Module):
            model = model._orig_mod
        else:
            return model


def save_checkpoint(model: nn.Module, path: str | os.PathLike[str]) -> str:
    """Save the unwrapped ``model``'s weights atomically; return the file's sha256."""
    state = {key: value.detach().cpu() for key, value in unwrap(model).state_dict().items()}
    path = Path(path)
    atomic_write(path, lambda handle: torch.save(state, handle))
    return sha256_file(path)


def load_checkpoint(
    path: str | os.PathLike[str], sha256: str | None = None
) -> dict[str, torch.Tensor]:
    """Load a state_dict with ``weights_only=True``, checking its sha256 when one is given."""
    path = Path(path)
    if not path.is_file():
        raise CheckpointError(f"checkpoint {path} does not exist")
    if sha256 is not None:
        found = sha256_file(path)
        if found != sha256:
            raise CheckpointError(
                f"checkpoint {path} has sha256 {found[:12]}..., but {sha256[:12]}... was recorded "
                "when it was written: the file was changed or damaged. Restore it, or start a new "
                "run directory."
            )
    try:
        state = torch.load(path, map_location="cpu", weights_only=True)
    except Exception as exc:  # the unpickler raises several types for foreign content
        raise CheckpointError(
            f"checkpoint {path} could not be read as a weights-only state_dict ({exc}). "
            "filial only loads tensors and plain values; it never runs code from a file."
        ) from exc
    if not isinstance(state, dict) or not all(isinstance(v, torch.Tensor) for v in state.values()):
        raise CheckpointError(f"checkpoint {path} does not hold a state_dict of tensors")
    return state


def load_model(
    model_fn: Callable[[], nn.Module], path: str | os.PathLike[str], sha256: str | None = None
) -> nn.Module:
    """A fresh ``model_fn()`` module holding the checkpoint at ``path`` (checked against its
    recorded ``sha256``). Building the module draws initial weights: the caller's random
    streams are kept as they were."""
    with preserved_rng():
        model = model_fn()
    model.load_state_dict(load_checkpoint(path, sha256))
    return model

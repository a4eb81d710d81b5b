"""Prediction passes: a model's outputs over a whole loader, held-out figures across generations.

:func:`predict` runs a model (in ``eval()`` mode, restored afterwards, without moving the
caller's random streams) over a loader's whole dataset in index order; :func:`evaluate` does the
same under a process group, each rank scoring its shard and rank 0 receiving the whole, checked
index by index. :class:`HeldoutHistory` keeps the generations' held-out outputs and computes the
figures that need earlier generations: the ensemble of generations 0..g and the agreement with
the teacher.
"""

from __future__ import annotations

import contextlib
from collections.abc import Generator
from dataclasses import dataclass
from pathlib import Path
from typing import Any

import numpy as np
import torch
from torch import nn
from torch.utils.data import DataLoader, DistributedSampler

from . import distributed
from ._faults import fault_point
from .checkpoint import unwrap
from .data import Replay, code_count, sequential_loader
from .metrics import Metric
from .seeding import preserved_rng


@dataclass
class Predictions:
    """A model's outputs on a whole loader, in dataset index order."""

    outputs: torch.Tensor  # (N, C) float32 on the CPU
    labels: torch.Tensor  # (N, ...) on the CPU
    indices: torch.Tensor | None = None  # a shard's dataset index per row (None: all, in order)


def move_to(value: Any, device: torch.device) -> Any:
    """Move tensors inside (nested tuples, lists, dicts of) ``value`` to ``device``."""
    if isinstance(value, torch.Tensor):
        return value.to(device, non_blocking=True) if value.device != device else value
    if isinstance(value, (list, tuple)):
        moved = [move_to(v, device) for v in value]
        return type(value)(moved) if not hasattr(value, "_fields") else type(value)(*moved)
    if isinstance(value, dict):
        return {k: move_to(v, device) for k, v in value.items()}
    return value


def model_device(model: nn.Module) -> torch.device:
    """Where the model's first parameter (or buffer) is; the CPU for a module without any."""
    for parameter in model.parameters():
        return parameter.device
    for buffer in model.buffers():
        return buffer.device
    return torch.device("cpu")


def scored_batches(
    model: nn.Module,
    loader: DataLoader,
    seed: int,
    fault: str | None = None,
    replay: Replay | None = None,
    sampler: DistributedSampler | None = None,
) -> Generator[tuple[list[int], torch.Tensor, torch.Tensor], None, None]:
    """``(codes, outputs, labels)`` batch by batch, ``model`` in eval mode (restored afterwards)
    over ``loader``'s whole dataset in code order (or ``sampler``'s shard of the codes).

    Outputs stay on the model's device (no synchronisation per batch). A dataset with random
    augmentation draws from the global generators in this process when the loader has no
    workers: the pass must not move the user's streams, so it runs inside a fork of them.
    """
    module = unwrap(model)
    device = model_device(module)
    was_training = module.training
    module.eval()
    try:
        with preserved_rng(), torch.inference_mode():
            for indices, inputs, labels in sequential_loader(loader, seed, replay, sampler):
                if fault is not None:
                    fault_point("teacher", fault)
                out = module(move_to(inputs, device))
                if not isinstance(out, torch.Tensor) or out.ndim != 2 or len(out) != len(indices):
                    shape = tuple(out.shape) if isinstance(out, torch.Tensor) else type(out)
                    raise ValueError(
                        "the model must return a tensor of shape (batch, outputs) with one row "
                        f"per sample, but returned {shape} for a batch of {len(indices)}"
                    )
                yield indices, out, torch.as_tensor(labels)
    finally:
        module.train(was_training)


class _Rows:
    """The rows of one pass, filled batch by batch: outputs on the model's device (copied to
    the CPU once, at the end), labels on the CPU, and a shard's sample codes."""

    def __init__(self, size: int, sharded: bool) -> None:
        self.size = size
        self.filled = 0
        self.order = torch.empty(size, dtype=torch.int64) if sharded else None
        self.outputs: torch.Tensor | None = None
        self.labels: torch.Tensor | None = None

    def add(self, codes: list[int], out: torch.Tensor, labels: torch.Tensor) -> None:
        if self.outputs is None or self.labels is None:
            self.outputs = torch.empty(
                (self.size, out.shape[1]), dtype=torch.float32, device=out.device
            )
            self.labels = torch.empty((self.size, *labels.shape[1:]), dtype=labels.dtype)
        elif out.shape[1] != self.outputs.shape[1]:
            raise ValueError(
                f"the model's output width changed within one pass "
                f"({self.outputs.shape[1]} then {out.shape[1]})"
            )
        start, end = self.filled, self.filled + len(codes)
        if self.order is None and int(codes[0]) != start:
            raise RuntimeError(f"evaluation batch starts at {int(codes[0])}, not {start}")
        if self.order is not None:
            self.order[start:end] = torch.as_tensor(codes, dtype=torch.int64)
        self.outputs[start:end] = out
        self.labels[start:end] = labels
        self.filled = end

    def result(self) -> Predictions:
        if self.outputs is None or self.labels is None or self.filled != self.size:
            raise RuntimeError(f"the evaluation pass covered {self.filled} of {self.size} samples")
        return Predictions(self.outputs.cpu(), self.labels, self.order)


def predict(
    model: nn.Module,
    loader: DataLoader,
    seed: int,
    fault: str | None = None,
    replay: Replay | None = None,
    sampler: DistributedSampler | None = None,
) -> Predictions:
    """Outputs of ``model`` over ``loader``'s whole dataset (see :func:`scored_batches`).

    The batches come in index order, so each one fills the next rows of a buffer kept on the
    model's device; it is copied to the CPU once, at the end. With a ``replay`` the rows are the
    (sample, view) pairs in code order, ``i * views + v``. With ``sampler`` (a rank's shard of
    those codes) the rows follow the sampler and ``indices`` names them.
    """
    size = code_count(loader.dataset, replay) if sampler is None else len(sampler)
    rows = _Rows(size, sharded=sampler is not None)
    # closing(): the pass's eval mode and forked random streams end here, even if a batch fails.
    with contextlib.closing(scored_batches(model, loader, seed, fault, replay, sampler)) as passed:
        for codes, out, labels in passed:
            rows.add(codes, out, labels)
    return rows.result()


def evaluate(
    model: nn.Module,
    loader: DataLoader,
    seed: int,
    fault: str | None = None,
    replay: Replay | None = None,
) -> Predictions | None:
    """:func:`predict` over the whole dataset; under a process group each rank predicts its
    shard and rank 0 receives the whole, checked index by index (None on the other ranks)."""
    if not distributed.is_distributed():
        return predict(model, loader, seed, fault=fault, replay=replay)
    size = code_count(loader.dataset, replay)
    sampler = distributed.shard_sampler(range(size))  # a share of the codes i * views + v
    part = predict(model, loader, seed, fault=fault, replay=replay, sampler=sampler)
    assert part.indices is not None  # a sampler was given
    padding = distributed.padding_rows(sampler)
    whole = distributed.gather_indexed(
        part.indices, size, part.outputs, part.labels, padding=padding
    )
    return None if whole is None else Predictions(whole[0], whole[1])


def probe_outputs(model: nn.Module, inputs: Any) -> torch.Tensor:
    """The model's outputs on a few probe inputs: eval mode (restored), no gradients, and the
    caller's random streams untouched (dropout would draw from them)."""
    module = unwrap(model)
    was_training = module.training
    module.eval()
    try:
        with preserved_rng(), torch.inference_mode():
            return module(move_to(inputs, model_device(module)))
    finally:
        module.train(was_training)


def finite_module(model: nn.Module) -> bool:
    checks = [torch.isfinite(p).all() for p in unwrap(model).parameters()]
    return bool(torch.stack(checks).all()) if checks else True  # one device sync


def ensemble(stack: list[torch.Tensor], kind: str) -> torch.Tensor:
    """Averaged outputs of several generations: probabilities for ce (returned as log-probs,
    which are valid logits for any metric), raw outputs for l2."""
    if kind == "ce":
        probs = torch.stack([torch.softmax(o, dim=1) for o in stack]).mean(dim=0)
        return probs.clamp_min(1e-30).log()
    return torch.stack(stack).mean(dim=0)


class HeldoutHistory:
    """The finished generations' held-out outputs, and the figures that need several of them.

    Outputs are read from each generation's ``heldout.npy`` (through ``path_of(generation)``)
    the first time they are needed, so a resumed lineage computes the same ensembles as one
    that went straight through.
    """

    def __init__(self, path_of: Any, kind: str, metric: Metric) -> None:
        self._path_of = path_of
        self._kind = kind
        self._metric = metric
        self._outputs: dict[int, torch.Tensor] = {}

    def outputs(self, generation: int) -> torch.Tensor:
        if generation not in self._outputs:
            path: Path = self._path_of(generation)
            self._outputs[generation] = torch.from_numpy(np.load(path, allow_pickle=False))
        return self._outputs[generation]

    def add(self, generation: int, outputs: torch.Tensor) -> None:
        self._outputs[generation] = outputs

    def ensemble_metric(self, members: list[int], newest: Predictions) -> float:
        """The metric of the averaged outputs of ``members`` and the newest generation."""
        stack = [self.outputs(g) for g in members] + [newest.outputs]
        return self._metric(ensemble(stack, self._kind), newest.labels)

    def agreement(self, teacher: int, newest: Predictions) -> float | None:
        """Share of held-out samples where the newest generation's argmax is its teacher's
        (None for a single output, where argmax says nothing)."""
        if newest.outputs.shape[1] <= 1:
            return None
        agree = newest.outputs.argmax(dim=1) == self.outputs(teacher).argmax(dim=1)
        return float(agree.double().mean())

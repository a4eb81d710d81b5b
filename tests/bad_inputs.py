"""Data and model factories that are wrong on purpose, for the fault-table tests.

Recipes name them as ``bad_inputs:FUNCTION`` (pytest puts this folder on ``sys.path``; the
subprocess tests add it to ``PYTHONPATH``). Data are made here: small seeded tensors.
"""

from __future__ import annotations

import itertools

import torch
from torch import nn
from torch.utils.data import DataLoader, IterableDataset, TensorDataset


def _tensors(n: int, seed: int, classes: int = 10) -> TensorDataset:
    g = torch.Generator().manual_seed(seed)
    return TensorDataset(
        torch.randn(n, 64, generator=g), torch.randint(0, classes, (n,), generator=g)
    )


class _Stream(IterableDataset):
    def __iter__(self):
        for i in range(40):
            yield torch.zeros(64), torch.tensor(i % 10)


class _Triples(torch.utils.data.Dataset):
    def __len__(self) -> int:
        return 40

    def __getitem__(self, i: int):
        return torch.zeros(64), torch.tensor(i % 10), torch.tensor(0.0)


def iterable_train():
    return DataLoader(_Stream(), batch_size=8), DataLoader(_tensors(40, 1), batch_size=8)


def triple_batches():
    return DataLoader(_Triples(), batch_size=8), DataLoader(_tensors(40, 1), batch_size=8)


def labels_beyond_outputs():
    """Labels 0..11 for a 10-output model."""
    return DataLoader(_tensors(80, 0, classes=12), batch_size=8), DataLoader(
        _tensors(40, 1), batch_size=8
    )


def empty_heldout():
    return DataLoader(_tensors(80, 0), batch_size=8), DataLoader(_tensors(0, 1), batch_size=8)


def heldout_is_train():
    train = DataLoader(_tensors(80, 0), batch_size=8)
    return train, train


_SHARED = nn.Linear(64, 10)


def same_module():
    return _SHARED


_calls = itertools.count()


def wider_in_generation_one():
    """10 outputs, then 11 from the fourth call on: the command's probe, the lineage's probe and
    generation 0 get 10, generation 1 gets 11."""
    return nn.Linear(64, 10 if next(_calls) < 3 else 11)


class _Poisoned(nn.Sequential):
    """The same parameters as the sound model (so its checkpoint fits), NaN outputs."""

    def __init__(self) -> None:
        super().__init__(nn.Linear(64, 10))

    def forward(self, x: torch.Tensor) -> torch.Tensor:
        return super().forward(x) * float("nan")


_nan_calls = itertools.count()


def nan_in_generation_one():
    """A sound model for the probes and generation 0; generation 1's outputs are NaN."""
    return nn.Sequential(nn.Linear(64, 10)) if next(_nan_calls) < 3 else _Poisoned()


def scaled_data():
    """The same labels every time; inputs scaled by $BAD_INPUTS_SCALE (default 1)."""
    import os

    scale = float(os.environ.get("BAD_INPUTS_SCALE", "1"))
    train = _tensors(80, 0)
    inputs, labels = train.tensors
    return DataLoader(TensorDataset(inputs * scale, labels), batch_size=16), DataLoader(
        _tensors(40, 1), batch_size=16
    )


_interrupt_calls = itertools.count()


def interrupted_on_third_call(hidden=(16,)):
    """A model factory the user interrupts (Ctrl-C) while filial is still starting up."""
    if next(_interrupt_calls) == 2:
        raise KeyboardInterrupt
    return nn.Sequential(nn.Linear(64, 16), nn.ReLU(), nn.Linear(16, 10))

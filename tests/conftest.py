"""Shared fixtures: tiny synthetic classification data and tiny models.

The synthetic data here are made by the tests themselves (seeded Gaussian blobs), which keeps the
engine tests fast; the checks of the main job against outside sources use scikit-learn's digits.
"""

from __future__ import annotations

import logging

import pytest
import torch
from torch import nn
from torch.utils.data import DataLoader, TensorDataset


def blobs(n: int, classes: int = 3, features: int = 5, seed: int = 0) -> TensorDataset:
    """Gaussian blobs around fixed class centres (seeded, made here)."""
    g = torch.Generator().manual_seed(seed)
    centres = torch.randn(classes, features, generator=torch.Generator().manual_seed(1234)) * 2
    labels = torch.randint(0, classes, (n,), generator=g)
    inputs = centres[labels] + torch.randn(n, features, generator=g)
    return TensorDataset(inputs, labels)


class TinyNet:
    """A picklable model_fn: Linear(features, hidden) -> ReLU -> Linear(hidden, classes)."""

    def __init__(self, features: int = 5, classes: int = 3, hidden: int = 16) -> None:
        self.features, self.classes, self.hidden = features, classes, hidden

    def __call__(self) -> nn.Module:
        return nn.Sequential(
            nn.Linear(self.features, self.hidden), nn.ReLU(), nn.Linear(self.hidden, self.classes)
        )


@pytest.fixture
def loaders():
    """(train, heldout, test) loaders over blobs: 96 / 48 / 48 samples, shuffled training."""
    train = DataLoader(
        blobs(96, seed=1), batch_size=16, shuffle=True, generator=torch.Generator().manual_seed(0)
    )
    return train, DataLoader(blobs(48, seed=2), batch_size=32), DataLoader(blobs(48, seed=3))


@pytest.fixture(autouse=True)
def _capture_filial_logs(caplog):
    """Capture filial's log records from INFO up in every test (``caplog.text`` holds them), so
    a test can assert on a warning, and pytest shows them only for a test that fails."""
    caplog.set_level(logging.INFO, logger="filial")
    yield

"""Held-out metrics: ``(outputs, labels) -> float``, higher is better.

A metric sees the whole evaluated set at once (outputs ``(N, C)`` and labels on the CPU), so
non-decomposable metrics (AUC, F1) work. The default is accuracy for integer labels and negative
mean squared error for floating-point labels.

>>> import torch
>>> accuracy(torch.tensor([[0.1, 0.9], [0.8, 0.2]]), torch.tensor([1, 1]))
0.5
"""

from __future__ import annotations

from collections.abc import Callable

import torch

Metric = Callable[[torch.Tensor, torch.Tensor], float]


def accuracy(outputs: torch.Tensor, labels: torch.Tensor) -> float:
    """Share of rows whose argmax equals the integer label."""
    return float((outputs.argmax(dim=1) == labels).double().mean())


def negative_mse(outputs: torch.Tensor, labels: torch.Tensor) -> float:
    """Minus the mean squared error over all output elements (regression)."""
    return -float((outputs - labels.reshape(outputs.shape).to(outputs.dtype)).pow(2).mean())


def default_metric(labels: torch.Tensor) -> Metric:
    """Accuracy for integer labels, negative MSE for floating-point ones."""
    return negative_mse if labels.is_floating_point() else accuracy


def metric_name(metric: Metric | None) -> str:
    if metric is None:
        return "default"
    module = getattr(metric, "__module__", None) or ""
    name = getattr(metric, "__qualname__", None) or type(metric).__qualname__
    return f"{module}:{name}" if module else name


class _FloatMetric:
    """A metric whose result is checked and turned into a Python float (numpy scalars, 0-d
    tensors), so records stay JSON and the stop rule compares plain numbers."""

    def __init__(self, metric: Metric, name: str) -> None:
        self.metric = metric
        self.name = name

    def __call__(self, outputs: torch.Tensor, labels: torch.Tensor) -> float:
        value = self.metric(outputs, labels)
        try:
            return float(value)
        except (TypeError, ValueError) as exc:
            raise TypeError(
                f"metric {self.name} must return a number (higher is better), but returned "
                f"{type(value).__name__}"
            ) from exc


def as_float_metric(metric: Metric, name: str) -> Metric:
    return metric if isinstance(metric, _FloatMetric) else _FloatMetric(metric, name)

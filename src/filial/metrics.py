"""Held-out metrics: ``(outputs, labels) -> float``, higher is better.

A metric sees the whole evaluated set at once (outputs ``(N, C)`` and labels on the CPU), so
non-decomposable metrics (AUC, F1) work. The default is accuracy for integer labels and negative
mean squared error for floating-point labels.

The training-set figure of a record comes from the teacher pass, which holds no outputs of the
whole training set: a metric that is a sum over samples is computed there batch by batch
(:class:`SummedMetric`: ``batch_sums`` and ``from_sums``, as the two defaults are), and any
other metric is handed view 0's outputs of the whole training set, kept in memory for it
(``N x C`` float32 on the CPU).

>>> import torch
>>> accuracy(torch.tensor([[0.1, 0.9], [0.8, 0.2]]), torch.tensor([1, 1]))
0.5
"""

from __future__ import annotations

import math
from collections.abc import Callable, Sequence
from typing import Any, Protocol, runtime_checkable

import torch

from .errors import InputError

Metric = Callable[[torch.Tensor, torch.Tensor], float]
Sums = Sequence[torch.Tensor | float]


@runtime_checkable
class SummedMetric(Protocol):
    """A metric that is a function of sums over samples, computed batch by batch.

    ``batch_sums(outputs, labels)`` gives one batch's sums (numbers or 0-d tensors on the
    outputs' device, which stay there until the pass ends); the sums of every batch (and rank)
    are added up and ``from_sums(totals)`` gives the metric. Give a metric of your own these two
    methods (besides ``__call__`` for the held-out and test sets) and the training-set figure
    is streamed like the defaults' instead of needing the whole set in memory.

    >>> import torch
    >>> form = summed_form(accuracy)
    >>> outputs = torch.tensor([[0.1, 0.9], [0.8, 0.2], [0.3, 0.7]])
    >>> labels = torch.tensor([1, 1, 1])
    >>> first = form.batch_sums(outputs[:2], labels[:2])
    >>> second = form.batch_sums(outputs[2:], labels[2:])
    >>> totals = [float(a) + float(b) for a, b in zip(first, second)]
    >>> form.from_sums(totals) == accuracy(outputs, labels)
    True
    """

    def batch_sums(self, outputs: torch.Tensor, labels: torch.Tensor) -> Sums: ...

    def from_sums(self, sums: Sequence[float]) -> float: ...


class AccuracySums:
    """:func:`accuracy` as sums: hits and rows (integers, so the total is exact and the value
    is the one :func:`accuracy` gives on the whole set)."""

    def batch_sums(self, outputs: torch.Tensor, labels: torch.Tensor) -> Sums:
        return self.sums_of_predictions(outputs.argmax(dim=1), labels)

    def sums_of_predictions(self, predicted: torch.Tensor, labels: torch.Tensor) -> Sums:
        """The sums from the argmax of each row (for a caller that has it already)."""
        hits = predicted == labels
        return [hits.sum(), hits.numel()]

    def from_sums(self, sums: Sequence[float]) -> float:
        return float(sums[0]) / float(sums[1])


class _SquaredErrorSums:
    """:func:`negative_mse` as sums: squared errors (in float64) and elements. Equal to
    :func:`negative_mse` on the whole set up to its float32 rounding."""

    def batch_sums(self, outputs: torch.Tensor, labels: torch.Tensor) -> Sums:
        errors = (outputs - labels.reshape(outputs.shape).to(outputs.dtype)).pow(2)
        return [errors.double().sum(), errors.numel()]

    def from_sums(self, sums: Sequence[float]) -> float:
        return -float(sums[0]) / float(sums[1])


def accuracy(outputs: torch.Tensor, labels: torch.Tensor) -> float:
    """Share of rows whose argmax equals the integer label."""
    return float((outputs.argmax(dim=1) == labels).double().mean())


def negative_mse(outputs: torch.Tensor, labels: torch.Tensor) -> float:
    """Minus the mean squared error over all output elements (regression)."""
    return -float((outputs - labels.reshape(outputs.shape).to(outputs.dtype)).pow(2).mean())


def default_metric(labels: torch.Tensor) -> Metric:
    """Accuracy for integer labels, negative MSE for floating-point ones."""
    return negative_mse if labels.is_floating_point() else accuracy


def sample_scores(metric: Metric) -> Callable[[torch.Tensor, torch.Tensor], torch.Tensor] | None:
    """Per-sample scores whose mean over the samples is ``metric`` (float64, one per row), for
    the built-in metrics; None for any other metric (it may not be a mean over samples).

    Accuracy scores a row 1 or 0; negative MSE scores it by minus the mean of its squared
    errors (every row has the same width, so the mean of the rows is the metric). The report's
    paired bootstrap and its cross-fitted estimate resample or split these.

    >>> outputs, labels = torch.tensor([[0.1, 0.9], [0.8, 0.2]]), torch.tensor([1, 1])
    >>> sample_scores(accuracy)(outputs, labels).tolist()
    [1.0, 0.0]
    """
    if metric is accuracy:
        return _hits
    if metric is negative_mse:
        return _negative_squared_errors
    return None


def _hits(outputs: torch.Tensor, labels: torch.Tensor) -> torch.Tensor:
    return (outputs.argmax(dim=1) == labels).double()


def _negative_squared_errors(outputs: torch.Tensor, labels: torch.Tensor) -> torch.Tensor:
    errors = (outputs - labels.reshape(outputs.shape).to(outputs.dtype)).double().pow(2)
    return -errors.reshape(len(outputs), -1).mean(dim=1)


def metric_name(metric: Metric | None) -> str:
    if metric is None:
        return "default"
    module = getattr(metric, "__module__", None) or ""
    name = getattr(metric, "__qualname__", None) or type(metric).__qualname__
    return f"{module}:{name}" if module else name


class _FloatMetric:
    """A metric whose result is checked and turned into a Python float (numpy scalars, 0-d
    tensors), so records stay JSON and the stop rule compares plain numbers.

    A value that is not a number is a TypeError; NaN or an infinity is an
    :class:`~filial.errors.InputError` naming the metric. Filial scores only finite outputs
    (a generation whose outputs are not finite is recorded as diverged without being scored),
    so a non-finite value is the metric's own: with it no generation could ever be best, and
    the run would go on to ``max_generations`` for nothing. It is raised the first time the
    metric is called, in generation 0's ``finish``, before anything of that generation is
    written.

    >>> import torch
    >>> scored = as_float_metric(lambda outputs, labels: float("nan"), "my_auc")
    >>> scored(torch.zeros(3, 2), torch.zeros(3))  # doctest: +ELLIPSIS
    Traceback (most recent call last):
    ...
    filial.errors.InputError: metric my_auc returned nan on 3 samples; a metric should return ...
    """

    def __init__(self, metric: Metric, name: str) -> None:
        self.metric = metric
        self.name = name

    def __call__(self, outputs: torch.Tensor, labels: torch.Tensor) -> float:
        value = self.metric(outputs, labels)
        if isinstance(value, (str, bytes)):  # float("0.5") would take a string silently
            raise TypeError(
                f"metric {self.name} must return a number (higher is better), but returned "
                f"the string {value!r}"
            )
        try:
            number = float(value)
        except (TypeError, ValueError, RuntimeError) as exc:  # RuntimeError: a tensor of many
            raise TypeError(
                f"metric {self.name} must return a number (higher is better), but returned "
                f"{type(value).__name__}"
                + (f" of shape {tuple(value.shape)}" if isinstance(value, torch.Tensor) else "")
            ) from exc
        if not math.isfinite(number):
            raise InputError(
                f"metric {self.name} returned {number} on {len(outputs)} samples; a metric "
                "should return a finite number (higher is better), or no generation could be "
                "compared with another. If it is undefined on some sets (AUC with one class "
                "present, say), return a finite value for that case"
            )
        return number


def as_float_metric(metric: Metric, name: str) -> Metric:
    return metric if isinstance(metric, _FloatMetric) else _FloatMetric(metric, name)


def summed_form(metric: Any) -> SummedMetric | None:
    """The batch-by-batch form of ``metric`` (see :class:`SummedMetric`), or None when it has
    none and needs the whole set at once."""
    inner = metric.metric if isinstance(metric, _FloatMetric) else metric
    if inner is accuracy:
        return AccuracySums()
    if inner is negative_mse:
        return _SquaredErrorSums()
    if isinstance(inner, SummedMetric):  # has batch_sums and from_sums
        return inner
    return None

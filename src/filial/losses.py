"""The two student losses: squared error on outputs (``"l2"``) and soft cross-entropy (``"ce"``).

``l2``
    Generation 0 regresses on one-hot labels (integer labels) or on the labels themselves
    (floating-point labels: regression). Students regress on the teacher's raw outputs. The loss is
    the mean over the batch of the per-sample sum of squared errors.
``ce``
    Generation 0 uses cross-entropy on the labels. Students use
    ``T**2 * mean_b( -sum_c softmax(v/T)_c * log_softmax(z/T)_c )`` for student logits ``z`` and
    teacher logits ``v`` (Hinton, Vinyals & Dean 2015, "Distilling the knowledge in a neural
    network"; the ``T**2`` keeps gradient magnitudes comparable across temperatures).

In students the two terms are mixed as ``label_weight * label_term + (1 - label_weight) *
teacher_term``. ``label_weight`` is not clamped to [0, 1]: a negative value (teacher weight above
one) has been reported to help under heavy label noise (Das & Sanghavi, ICML 2023).

>>> import torch
>>> z = torch.tensor([[2.0, 0.0]]); v = torch.tensor([[2.0, 0.0]])
>>> round(float(soft_cross_entropy(z, v, temperature=1.0)), 4)  # = entropy of softmax(v)
0.3653
"""

from __future__ import annotations

import math
import numbers
from typing import Any, NamedTuple

import torch
import torch.nn.functional as F

from .errors import InputError

LOSS_KINDS = ("ce", "l2")
# Scalar regression: a model ending in .squeeze() returns (batch,); filial needs the column.
ONE_OUTPUT_HINT = (
    ". For one output per sample (scalar regression with targets='l2'), return shape "
    "(batch, 1): end with nn.Linear(features, 1) and do not squeeze its output; the labels may "
    "stay of shape (batch,)"
)


def squared_error(outputs: torch.Tensor, targets: torch.Tensor) -> torch.Tensor:
    """Mean over the batch of the per-sample sum of squared errors."""
    diff = outputs - targets
    return diff.pow(2).reshape(diff.shape[0], -1).sum(dim=1).mean()


def soft_cross_entropy(
    outputs: torch.Tensor, targets: torch.Tensor, temperature: float
) -> torch.Tensor:
    """``T**2`` times the batch mean of the cross-entropy from softmax(targets/T) to outputs/T."""
    t = float(temperature)
    if t == 1.0:  # the common case skips two divisions and a multiplication per step
        return F.cross_entropy(outputs, F.softmax(targets, dim=-1))
    # cross_entropy with probability targets is -mean_b sum_c p_c log_softmax(z)_c in one kernel.
    return F.cross_entropy(outputs / t, F.softmax(targets / t, dim=-1)) * (t * t)


class TopKTargets(NamedTuple):
    """A teacher's k largest outputs per sample and their classes (``top_k`` stores)."""

    values: torch.Tensor  # (B, k) float32
    classes: torch.Tensor  # (B, k) int64

    def to(self, device: torch.device, non_blocking: bool = False) -> TopKTargets:
        return TopKTargets(
            self.values.to(device, non_blocking=non_blocking),
            self.classes.to(device, non_blocking=non_blocking),
        )


def soft_cross_entropy_top_k(
    outputs: torch.Tensor, targets: TopKTargets, temperature: float
) -> torch.Tensor:
    """Soft cross-entropy to a teacher known only by its k largest logits.

    The teacher distribution is the softmax over those k logits, the other classes treated as
    absent (probability 0); the student keeps its softmax over all classes. With k = C this is
    :func:`soft_cross_entropy`.
    """
    t = float(temperature)
    teacher = F.softmax(targets.values / t, dim=-1)
    student = F.log_softmax(outputs / t, dim=-1).gather(1, targets.classes.long())
    return -(teacher * student).sum(dim=-1).mean() * (t * t)


def _is_integer(labels: torch.Tensor) -> bool:
    return not (labels.is_floating_point() or labels.is_complex())


def _fitting(targets: Any, outputs: torch.Tensor) -> Any:
    """``targets`` on the outputs' device, checked against the outputs' shape."""
    if isinstance(targets, TopKTargets):
        if targets.values.device != outputs.device:
            targets = targets.to(outputs.device, non_blocking=True)
        if len(targets.values) != len(outputs):
            raise InputError(
                f"{len(targets.values)} top-k targets for a batch of {len(outputs)} outputs"
            )
        return targets
    if targets.device != outputs.device:
        targets = targets.to(outputs.device, non_blocking=True)
    if targets.shape != outputs.shape:
        raise InputError(
            f"the model returned outputs of shape {tuple(outputs.shape)} but the teacher's "
            f"targets have shape {tuple(targets.shape)}: every generation must have the same "
            "output width"
        )
    return targets


class StudentLoss:
    """``loss(outputs, labels, targets)`` for one lineage's settings (``targets`` None: labels).

    The first call checks the labels once (their type and range against the output width), so
    a mistake is named in words instead of surfacing as an index error deep in a kernel.
    """

    def __init__(
        self,
        kind: str,
        temperature: float = 1.0,
        label_weight: float = 0.0,
        label_smoothing: float = 0.0,
    ) -> None:
        if kind not in LOSS_KINDS:
            raise ValueError(f"targets must be one of {LOSS_KINDS}, but got targets={kind!r}")
        if (
            not isinstance(temperature, numbers.Real)
            or isinstance(temperature, bool)
            or not math.isfinite(temperature)
            or temperature <= 0
        ):
            raise ValueError(
                f"temperature should be a positive finite number, but got {temperature=!r}"
            )
        if (
            not isinstance(label_weight, numbers.Real)
            or isinstance(label_weight, bool)
            or not math.isfinite(label_weight)
        ):
            raise ValueError(
                f"label_weight should be a finite number, but got label_weight={label_weight!r}"
            )
        if (
            not isinstance(label_smoothing, numbers.Real)
            or isinstance(label_smoothing, bool)
            or not 0.0 <= label_smoothing < 1.0
        ):
            raise ValueError(
                "label_smoothing should be a number in [0, 1), but got "
                f"label_smoothing={label_smoothing!r}"
            )
        if label_smoothing and kind != "ce":
            raise ValueError(
                f"label_smoothing={label_smoothing!r} smooths the targets of cross-entropy; "
                f"it applies to kind='ce' only, but got kind={kind!r}"
            )
        self.kind: str = kind
        self.temperature: float = float(temperature)
        self.label_weight: float = float(label_weight)
        # PyTorch's cross_entropy(label_smoothing=eps): the one-hot target mixed with the
        # uniform distribution (Szegedy et al. 2016). Only the label-smoothing baseline sets it.
        self.label_smoothing: float = float(label_smoothing)
        self._checked: bool = False

    def check(self, outputs: torch.Tensor, labels: torch.Tensor) -> None:
        """Raise a clear error when labels and outputs cannot go together."""
        if not isinstance(outputs, torch.Tensor) or outputs.ndim != 2:
            shape = tuple(outputs.shape) if isinstance(outputs, torch.Tensor) else type(outputs)
            squeezed = isinstance(outputs, torch.Tensor) and outputs.ndim == 1
            hint = ONE_OUTPUT_HINT if squeezed else ""
            raise InputError(
                f"the model must return a tensor of shape (batch, outputs), but returned "
                f"{shape}{hint}"
            )
        if not isinstance(labels, torch.Tensor):
            raise InputError(f"labels must be a tensor, but the batch held {type(labels).__name__}")
        if labels.shape[0] != outputs.shape[0]:
            raise InputError(
                f"the batch has {labels.shape[0]} labels but the model returned "
                f"{outputs.shape[0]} rows"
            )
        width = outputs.shape[1]
        if _is_integer(labels):
            if labels.ndim != 1:
                raise InputError(
                    f"integer labels must have shape (batch,), but got {tuple(labels.shape)}"
                )
            if labels.numel():
                low, high = int(labels.min()), int(labels.max())
                if low < 0 or high >= width:
                    raise InputError(
                        f"labels range over [{low}, {high}] but the model has {width} outputs: "
                        f"class labels must lie in [0, {width - 1}]. Widen the model's last "
                        "layer or relabel the classes from 0."
                    )
        elif self.kind == "ce":
            raise InputError(
                "targets='ce' needs integer class labels, but the labels are floating point. "
                "Use targets='l2' for regression."
            )
        elif labels.numel() != outputs.numel():
            raise InputError(
                f"regression labels of shape {tuple(labels.shape)} do not match outputs of shape "
                f"{tuple(outputs.shape)}"
            )

    def label_term(self, outputs: torch.Tensor, labels: torch.Tensor) -> torch.Tensor:
        if self.kind == "ce":
            if self.label_smoothing:
                return F.cross_entropy(outputs, labels, label_smoothing=self.label_smoothing)
            return F.cross_entropy(outputs, labels)
        if _is_integer(labels):
            return squared_error(outputs, F.one_hot(labels, outputs.shape[1]).to(outputs.dtype))
        return squared_error(outputs, labels.reshape(outputs.shape).to(outputs.dtype))

    def teacher_term(self, outputs: torch.Tensor, targets: torch.Tensor) -> torch.Tensor:
        if isinstance(targets, TopKTargets):
            return soft_cross_entropy_top_k(outputs, targets, self.temperature)
        if self.kind == "ce":
            return soft_cross_entropy(outputs, targets, self.temperature)
        return squared_error(outputs, targets)

    def __call__(
        self, outputs: torch.Tensor, labels: torch.Tensor, targets: torch.Tensor | None
    ) -> torch.Tensor:
        if not self._checked:
            self.check(outputs, labels)
            self._checked = True
        if labels.device != outputs.device:
            labels = labels.to(outputs.device, non_blocking=True)
        if targets is None:
            return self.label_term(outputs, labels)
        targets = _fitting(targets, outputs)
        weight = self.label_weight
        loss = self.teacher_term(outputs, targets)
        if weight != 0.0:
            loss = (1.0 - weight) * loss + weight * self.label_term(outputs, labels)
        return loss

"""What a finished generation's record holds: one typed shape, written in one place.

A record is a plain JSON object (it goes into ``lineage.json`` and ``result.records`` as a
dict), so these are :class:`~typing.TypedDict` shapes rather than classes: the generation room
writes the measured fields, the lineage adds the ones that need earlier generations
(``ensemble``, ``agreement``) and, on the last one, ``stop``; the stop rule, the report and
TensorBoard read them. A field added later is optional (``NotRequired``), so that records
written by earlier versions still read.

>>> is_number(0.5), is_number(float("nan")), is_number(True), is_number(None)
(True, False, False, False)
"""

from __future__ import annotations

import math
import numbers
from typing import Any, NotRequired, TypedDict, TypeGuard


class EpochEntry(TypedDict, total=False):
    """One logged epoch: ``gen.log_epoch(epoch, loss=..., ...)``."""

    epoch: int
    loss: float
    running_accuracy: float
    running_neg_mse: float
    heldout: float  # early-stopped baselines: the held-out metric after this epoch


class StopDetail(TypedDict, total=False):
    """Why the lineage stopped, on the record of the generation where it did."""

    reason: str
    best: int | None
    generation: int  # diverged, collapse
    why: str  # collapse
    last_gain: int  # no-gain
    patience: int
    min_gain: float
    max_generations: int  # max-generations
    forecast_best: int  # forecast: the spectral forecast's best generation


class SpectrumFigures(TypedDict):
    """The spectral view of one generation (:func:`filial.spectral.spectrum_figures`)."""

    energy: float  # squared norm of the centred training outputs on the subset
    top1: float  # share of that energy in the top 1 % of eigen-indices
    top10: float
    top50: float
    rest: float  # beyond the top half (the outside included)
    outside: float  # share outside the kernel's span (outputs no function of its features makes)
    components95: int  # the fewest components holding 95 % of the energy
    participation: float  # (sum e)^2 / sum e^2


class GenerationRecord(TypedDict):
    """One finished generation (the fields of the README's "Records" section)."""

    generation: int
    teacher: int | None  # the teacher's generation index; None for generation 0
    mode: str  # "labels", "cached" or "online": what the generation learned from
    heldout: float | None  # None when the generation diverged
    test: float | None
    train: float | None  # against the original training labels
    ensemble: float | None  # held-out metric of the averaged outputs of generations 0..g
    agreement: float | None  # held-out argmax agreement with the teacher
    diverged: bool
    target_entropy: NotRequired[float]  # ce
    output_norm: NotRequired[float]  # l2
    prediction_share: NotRequired[float]  # share of training predictions in the top class
    label_share: NotRequired[float]  # share of training labels in the top class
    checkpoint: str  # relative to the run directory: genG/student.pt
    checkpoint_sha256: str
    epochs: list[EpochEntry]
    passes: NotRequired[int]  # passes over gen.loader (records of earlier versions lack them)
    batches: NotRequired[int]
    seconds: float
    stop: NotRequired[StopDetail]
    # With an unlabelled pool: this generation's pass over it (filial.pool.figures_of)
    pool: NotRequired[dict[str, Any]]
    spectrum: NotRequired[SpectrumFigures]  # with the spectral view (spectrum_samples > 0)
    spectrum_seconds: NotRequired[float]  # its cost in this generation (kernel: generation 0)
    forecast: NotRequired[dict[str, Any]]  # generation 0: filial.spectral.forecast's result


class DecisionState(TypedDict):
    """The decision after the newest generation, as ``lineage.json`` keeps it."""

    stop: bool
    reason: str | None
    best: int | None
    detail: dict[str, Any]


class BaselineRecord(GenerationRecord):
    """A baseline trained on the labels (``RUN/baseline/NAME/baseline.json``; the matched
    baseline of runs made before named baselines: ``RUN/baseline/baseline.json``)."""

    kind: str  # "matched-baseline", "early-stopping-baseline", "label-smoothing-baseline"
    epochs_matched: int  # the epochs the whole lineage trained, and so this baseline
    name: NotRequired[str]  # "matched", "early-stopping", "label-smoothing" (absent: matched)
    every: NotRequired[int]  # early-stopped: held-out after every k-th epoch and the last
    label_smoothing: NotRequired[float]  # label-smoothing: PyTorch's epsilon
    best_epoch: NotRequired[int | None]  # early-stopped: the epoch kept (None: all diverged)
    evaluated: NotRequired[list[int]]  # early-stopped: the epochs scored on held-out data
    heldout_epochs: NotRequired[str | None]  # their per-sample held-out scores (built-in metric)


def is_number(value: Any) -> TypeGuard[float]:
    """A real, finite number that is not a bool (what a record's metric fields hold)."""
    return isinstance(value, numbers.Real) and not isinstance(value, bool) and math.isfinite(value)


def mode_of(teacher: int | None, online: bool) -> str:
    """What a generation learned from: the labels, the cache, or a teacher run online."""
    if teacher is None:
        return "labels"
    return "online" if online else "cached"

"""When to stop adding generations, and which one to keep.

:class:`StopRule` reads the records of the finished generations and returns a :class:`Decision`.
Its checks, in order, on the newest generation:

``diverged``
    its loss or outputs were not finite. It is never the best nor the teacher of another.
``collapse``
    degenerate predictions: one class predicted for nearly every training sample (share at least
    ``collapse_share``, and more than the most common label's own share), or, for ``l2``, the mean
    output norm shrunk below ``collapse_norm`` times generation 0's. This is the end point of
    repeated self-distillation in the kernel regime, where every round multiplies each
    eigencomponent of the predictions by ``d_i / (d_i + c) < 1`` (Mobahi, Farajtabar & Bartlett,
    NeurIPS 2020).
``no-gain``
    over-regularisation: for ``patience`` generations nothing beat the best held-out metric by more
    than ``min_gain``.
``max-generations``
    ``max_generations`` generations after generation 0 are done.

The best generation is the held-out argmax over generations that did not diverge; ties go to the
earlier, cheaper one.

>>> rule = StopRule(max_generations=8, patience=2)
>>> records = [{"generation": g, "heldout": h} for g, h in enumerate([0.80, 0.85, 0.84, 0.83])]
>>> d = rule.decide(records)
>>> d.stop, d.reason, d.best
(True, 'no-gain', 1)
"""

from __future__ import annotations

import math
import operator
from collections.abc import Mapping, Sequence
from dataclasses import dataclass, field
from typing import Any

import numpy as np
import torch

from .metrics import accuracy
from .records import is_number

STOP_REASONS = ("no-gain", "collapse", "diverged", "max-generations", "forecast")


@dataclass(frozen=True)
class Decision:
    """The outcome after the newest generation: go on, or stop (with why), and the best so far."""

    stop: bool
    reason: str | None
    best: int | None
    detail: dict[str, Any] = field(default_factory=dict)


def as_count(value: Any, name: str, minimum: int = 0) -> int:
    """``value`` as a Python int >= ``minimum`` (numpy integers welcome, bools not)."""
    try:
        if isinstance(value, bool):
            raise TypeError
        number = operator.index(value)
    except TypeError:
        raise ValueError(
            f"{name} should be an integer >= {minimum}, but got {name}={value!r}"
        ) from None
    if number < minimum:
        raise ValueError(f"{name} should be an integer >= {minimum}, but got {name}={value!r}")
    return number


class StopRule:
    """Patience, ``min_gain``, ``max_generations``, collapse and divergence over records."""

    def __init__(
        self,
        max_generations: int = 8,
        patience: int = 2,
        min_gain: float = 0.0,
        collapse_share: float = 0.95,
        collapse_norm: float = 0.05,
    ) -> None:
        problems = []
        try:
            max_generations = as_count(max_generations, "max_generations", minimum=0)
        except ValueError as exc:
            problems.append(str(exc))
        try:
            patience = as_count(patience, "patience", minimum=1)
        except ValueError as exc:
            problems.append(str(exc))
        if not is_number(min_gain) or min_gain < 0:
            problems.append(f"min_gain should be a finite number >= 0, but got {min_gain!r}")
        if not is_number(collapse_share) or not 0 < collapse_share <= 1:
            problems.append(f"collapse_share should lie in (0, 1], but got {collapse_share!r}")
        if not is_number(collapse_norm) or collapse_norm < 0:
            problems.append(f"collapse_norm should be >= 0, but got {collapse_norm!r}")
        if problems:
            raise ValueError("; ".join(problems))
        self.max_generations = max_generations
        self.patience = patience
        self.min_gain = float(min_gain)
        self.collapse_share = float(collapse_share)
        self.collapse_norm = float(collapse_norm)

    @staticmethod
    def best(records: Sequence[Mapping[str, Any]]) -> int | None:
        """Held-out argmax over generations that did not diverge; ties to the earlier one."""
        best, best_value = None, -math.inf
        for record in records:
            value = record.get("heldout")
            if record.get("diverged") or not is_number(value):
                continue
            if value > best_value:
                best, best_value = record["generation"], value
        return best

    def collapsed(self, record: Mapping[str, Any], first: Mapping[str, Any]) -> str | None:
        """Why ``record`` looks degenerate, or None."""
        share = record.get("prediction_share")
        label_share = record.get("label_share")
        if (
            is_number(share)
            and share >= self.collapse_share
            and (not is_number(label_share) or share > label_share)
        ):
            return f"{share:.1%} of training predictions fall in one class"
        norm, norm0 = record.get("output_norm"), first.get("output_norm")
        if (
            record["generation"] > 0
            and is_number(norm)
            and is_number(norm0)
            and norm0 > 0
            and norm < self.collapse_norm * norm0
        ):
            return f"mean output norm {norm:.3g} shrank below {self.collapse_norm} x generation 0's"
        return None

    def decide(self, records: Sequence[Mapping[str, Any]]) -> Decision:
        """The decision after the last of ``records`` (one per finished generation, in order)."""
        if not records:
            raise ValueError("decide() needs the record of at least one finished generation")
        newest = records[-1]
        generation = int(newest["generation"])
        best = self.best(records)
        if newest.get("diverged"):
            return Decision(True, "diverged", best, {"generation": generation})
        why = self.collapsed(newest, records[0])
        if why is not None:
            return Decision(True, "collapse", best, {"generation": generation, "why": why})
        running, last_gain = -math.inf, None
        for record in records:
            value = record.get("heldout")
            if record.get("diverged") or not is_number(value):
                continue
            if last_gain is None or value > running + self.min_gain:
                last_gain = record["generation"]
            running = max(running, value)
        if last_gain is not None and generation - last_gain >= self.patience:
            return Decision(
                True,
                "no-gain",
                best,
                {"last_gain": last_gain, "patience": self.patience, "min_gain": self.min_gain},
            )
        if generation >= self.max_generations:
            return Decision(
                True, "max-generations", best, {"max_generations": self.max_generations}
            )
        return Decision(False, None, best)


@dataclass(frozen=True)
class Interval:
    """An observed held-out gain and its paired bootstrap interval."""

    observed: float
    low: float
    high: float
    level: float
    resamples: int


def paired_bootstrap(
    metric: Any,
    outputs_a: Any,
    outputs_b: Any,
    labels: Any,
    *,
    resamples: int = 2000,
    level: float = 0.95,
    seed: int = 0,
) -> Interval:
    """Percentile bootstrap interval of ``metric(b) - metric(a)`` over the same resampled examples.

    Paired: each resample draws held-out examples with replacement and scores both models on the
    same draw, so the interval reflects the gain, not the two models' separate noise (the
    percentile bootstrap of Efron & Tibshirani, "An Introduction to the Bootstrap", 1993).
    ``metric`` is ``(outputs, labels) -> float`` on tensors; accuracy is vectorised.

    >>> labels = torch.tensor([0, 1] * 50)
    >>> a = torch.nn.functional.one_hot(torch.zeros(100, dtype=torch.long), 2).float()
    >>> b = torch.nn.functional.one_hot(labels, 2).float()
    >>> paired_bootstrap(accuracy, a, b, labels).observed
    0.5
    """
    _check_bootstrap(level, resamples)
    n = len(labels)
    if n == 0 or len(outputs_a) != n or len(outputs_b) != n:
        raise ValueError(
            f"outputs and labels must have the same non-zero length, got "
            f"{len(outputs_a)}, {len(outputs_b)} and {n}"
        )
    observed = float(metric(outputs_b, labels)) - float(metric(outputs_a, labels))
    if metric is accuracy:
        gain = (
            (outputs_b.argmax(dim=1) == labels).double()
            - (outputs_a.argmax(dim=1) == labels).double()
        ).numpy()
        interval = bootstrap_mean(gain, resamples=resamples, level=level, seed=seed)
        return Interval(observed, interval.low, interval.high, level, resamples)
    draws = _draws(n, resamples, seed)
    samples = np.empty(resamples)
    for row, draw in enumerate(draws):
        index = torch.from_numpy(draw)
        samples[row] = float(metric(outputs_b[index], labels[index])) - float(
            metric(outputs_a[index], labels[index])
        )
    return _percentile(observed, samples, level)


def bootstrap_mean(
    differences: Any, *, resamples: int = 2000, level: float = 0.95, seed: int = 0
) -> Interval:
    """Percentile bootstrap interval of the mean of per-sample ``differences`` (one per
    held-out sample: a paired gain, ``score_b - score_a``), as :func:`paired_bootstrap` draws
    it for accuracy: the same resamples for the same ``seed`` and length.

    The report calls it with the per-sample scores of :func:`filial.metrics.sample_scores`:
    for a metric that is a mean over samples, the mean of the differences on a resample is the
    paired gain on that resample; averaged over seeds that share one held-out set, it is the
    gain of the mean over seeds (one draw of samples for every seed).

    >>> bootstrap_mean(np.array([1.0, 0.0, 1.0, 1.0])).observed
    0.75
    """
    values = np.asarray(differences, dtype=np.float64)
    if values.ndim != 1 or len(values) == 0:
        raise ValueError(
            f"differences should be a non-empty vector, one per sample, but got shape "
            f"{values.shape}"
        )
    _check_bootstrap(level, resamples)
    samples = values[_draws(len(values), resamples, seed)].mean(axis=1)
    return _percentile(float(values.mean()), samples, level)


def bootstrap_crossed(
    differences: Any, *, resamples: int = 2000, level: float = 0.95, seed: int = 0
) -> Interval:
    """Percentile bootstrap interval of the mean of a ``(seeds, samples)`` table of per-sample
    differences, where every seed scored the same held-out samples: each resample draws the
    seeds and the samples independently, with replacement (the samples drawn are the same for
    every seed drawn), so the interval holds the seed-to-seed spread as well as the spread
    over held-out samples.

    This is the bootstrap of a crossed design, rows and columns resampled independently
    (Owen, "The pigeonhole bootstrap", Annals of Applied Statistics 2007; cited from memory).
    With one seed it is :func:`bootstrap_mean`'s interval (other draws). Few seeds give a
    coarse, honest interval: three seeds that disagree leave it wide.

    >>> table = np.array([[1.0, 1.0, 0.0, 1.0], [1.0, 0.0, 1.0, 1.0]])
    >>> bootstrap_crossed(table).observed
    0.75
    """
    values = np.asarray(differences, dtype=np.float64)
    if values.ndim != 2 or 0 in values.shape:
        raise ValueError(
            f"differences should be a non-empty (seeds, samples) table, but got shape "
            f"{values.shape}"
        )
    _check_bootstrap(level, resamples)
    seeds, samples = values.shape
    rng = np.random.default_rng(seed)
    draws = rng.integers(0, samples, size=(resamples, samples))
    per_seed = np.stack([row[draws].mean(axis=1) for row in values])  # (seeds, resamples)
    chosen = rng.integers(0, seeds, size=(resamples, seeds))
    means = per_seed[chosen, np.arange(resamples)[:, None]].mean(axis=1)
    return _percentile(float(values.mean()), means, level)


def _check_bootstrap(level: float, resamples: int) -> None:
    if not 0 < level < 1:
        raise ValueError(f"level should lie in (0, 1), but got level={level!r}")
    if not isinstance(resamples, int) or resamples < 1:
        raise ValueError(f"resamples should be a positive integer, but got {resamples!r}")


def _draws(n: int, resamples: int, seed: int) -> np.ndarray:
    """The resampled sample indices, one row per resample (drawn with replacement)."""
    return np.random.default_rng(seed).integers(0, n, size=(resamples, n))


def _percentile(observed: float, samples: np.ndarray, level: float) -> Interval:
    tail = (1 - level) / 2 * 100
    low, high = np.percentile(samples, [tail, 100 - tail])
    return Interval(observed, float(low), float(high), level, len(samples))

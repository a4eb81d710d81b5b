"""Is a gain real, and against what: the kept generation against generation 0 and every
baseline, plain and cross-fitted, per seed and across seeds.

An :class:`Arm` is one model compared (the kept generation, generation 0, a baseline) by its
per-sample held-out scores (:func:`filial.metrics.sample_scores`): ``plain`` as the run reports
it, ``fitted`` the cross-fitted out-of-half scores of :mod:`filial.crossfit` (for an arm that
chose nothing on the held-out set, such as generation 0 or the matched baseline, the plain
scores are also its cross-fitted ones). :func:`compare` gives the paired gain of one arm over
another with its percentile bootstrap interval (:func:`filial.stopping.bootstrap_mean`, Efron &
Tibshirani 1993), plain and cross-fitted, and a :func:`status`: ``established`` when the interval
lies above 0, ``worse`` when it lies below, ``inconclusive`` when it holds 0.
:func:`across_seeds` does the same for the mean over seeds that share one held-out set: each
resample draws seeds and held-out samples (the same samples for every seed drawn), so its
interval holds the seed-to-seed spread too.

>>> kept = Arm("kept", np.array([1.0, 1, 1, 0]), None)
>>> first = Arm("generation 0", np.array([1.0, 0, 1, 0]), None)
>>> found = compare(kept, first, resamples=200)
>>> found["plain"]["observed"], found["status"]
(0.25, 'inconclusive')
"""

from __future__ import annotations

from collections.abc import Sequence
from dataclasses import dataclass, field
from typing import Any

import numpy as np

from .stopping import Interval, bootstrap_crossed, bootstrap_mean

RESAMPLES = 2000
LEVEL = 0.95


@dataclass
class Arm:
    """One model compared: per-sample held-out scores, plain and cross-fitted, and its test
    figure (reported, never used to choose)."""

    name: str
    plain: np.ndarray
    fitted: np.ndarray | None
    test: float | None = None
    detail: dict[str, Any] = field(default_factory=dict)


def interval(differences: np.ndarray, resamples: int = RESAMPLES) -> dict[str, Any]:
    """The mean of per-sample ``differences`` and its paired bootstrap interval, as plain
    data (what ``filial report --json`` prints). A ``(seeds, samples)`` table gets the
    interval of :func:`~filial.stopping.bootstrap_crossed` (seeds and samples resampled)."""
    if np.ndim(differences) == 2:
        found = bootstrap_crossed(differences, resamples=resamples, level=LEVEL, seed=0)
    else:
        found = bootstrap_mean(differences, resamples=resamples, level=LEVEL, seed=0)
    return _plain(found)


def _plain(found: Interval) -> dict[str, Any]:
    return {
        "observed": found.observed,
        "low": found.low,
        "high": found.high,
        "level": found.level,
        "resamples": found.resamples,
    }


def status(found: dict[str, Any]) -> str:
    """``established`` (the interval lies above 0), ``worse`` (below 0) or ``inconclusive``."""
    if found["low"] > 0:
        return "established"
    if found["high"] < 0:
        return "worse"
    return "inconclusive"


def compare(kept: Arm, other: Arm, resamples: int = RESAMPLES) -> dict[str, Any]:
    """The gain of ``kept`` over ``other``: plain, cross-fitted (when both arms have
    cross-fitted scores), on the test set, and its status (judged on the cross-fitted gain
    when there is one: it is not chosen on the samples it scores)."""
    plain = interval(kept.plain - other.plain, resamples)
    fitted = None
    if kept.fitted is not None and other.fitted is not None:
        fitted = interval(kept.fitted - other.fitted, resamples)
    test = None if kept.test is None or other.test is None else kept.test - other.test
    return {
        "against": other.name,
        "plain": plain,
        "cross_fitted": fitted,
        "test": test,
        "status": status(fitted or plain),
        "samples": len(kept.plain),
        "detail": dict(other.detail),
    }


def across_seeds(pairs: Sequence[tuple[Arm, Arm]], resamples: int = RESAMPLES) -> dict[str, Any]:
    """The mean over seeds of the gain of each pair's first arm over its second (one pair per
    seed, all over the same held-out samples), its interval (seeds and held-out samples
    resampled, :func:`~filial.stopping.bootstrap_crossed`) and the seeds' own gains."""

    def table(attribute: str) -> np.ndarray | None:
        rows = [(getattr(k, attribute), getattr(o, attribute)) for k, o in pairs]
        if any(a is None or b is None for a, b in rows):
            return None
        return np.stack([a - b for a, b in rows])

    plain_table = table("plain")
    assert plain_table is not None  # every arm has plain scores
    plain = interval(plain_table, resamples)
    plain["per_seed"] = plain_table.mean(axis=1).tolist()
    fitted_table = table("fitted")
    fitted = None
    if fitted_table is not None:
        fitted = interval(fitted_table, resamples)
        fitted["per_seed"] = fitted_table.mean(axis=1).tolist()
    tests = [k.test - o.test for k, o in pairs if k.test is not None and o.test is not None]
    return {
        "against": pairs[0][1].name,
        "plain": plain,
        "cross_fitted": fitted,
        "test": float(np.mean(tests)) if len(tests) == len(pairs) else None,
        "status": status(fitted or plain),
        "samples": plain_table.shape[1],
        "seeds": len(pairs),
    }


def closest(comparisons: Sequence[dict[str, Any]]) -> dict[str, Any] | None:
    """The comparison with the smallest gain (cross-fitted where there is one): the baseline
    that came closest to the kept generation, or beat it by most."""
    if not comparisons:
        return None
    return min(comparisons, key=lambda c: (c["cross_fitted"] or c["plain"])["observed"])

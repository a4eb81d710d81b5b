"""A held-out figure not chosen on the data it scores: the cross-fitted estimate.

The kept generation is the held-out argmax over the generations, and an early-stopped
baseline's epoch is the held-out argmax over its epochs: each figure is the best of several on
the very samples that chose it, so it is optimistic (the more candidates, the more so). The
cross-fitted estimate splits the held-out set into two fixed halves, chooses on one half and
scores the choice on the other, both ways: every held-out sample is then scored by a candidate
that was chosen without it. This is the repeated-split logic of cross-validation (Hastie,
Tibshirani & Friedman, "The Elements of Statistical Learning", 2nd ed. 2009, ch. 7.10) with two
folds, applied to the choice among candidates rather than to the fit; it is an estimate, with
the variance of one split, not a guarantee.

Everything here works on per-sample scores (:func:`filial.metrics.sample_scores`: a metric that
is a mean over samples), one row per candidate: ``scores[c, i]`` is candidate ``c``'s score on
held-out sample ``i``. The cross-fitted figure is the mean over all samples of the
out-of-half scores, that is the two halves' scores averaged, each weighted by its size (the
halves differ by one sample when the held-out set is odd). The paired bootstrap of a gain then
resamples those out-of-half scores (:func:`filial.stopping.bootstrap_mean`), given the choices.

>>> scores = np.array([[1, 1, 0, 0], [0, 1, 1, 1]], dtype=float)  # 2 candidates, 4 samples
>>> fitted = cross_fit(scores, (np.array([0, 1]), np.array([2, 3])))
>>> fitted.choices, fitted.value  # 0 wins on samples 0-1 but scores 0 on 2-3, and so on
((0, 1), 0.25)
"""

from __future__ import annotations

from collections.abc import Sequence
from dataclasses import dataclass

import numpy as np

# The split depends on the lineage's seed alone (and on this constant), so every reading of a
# run gives the same halves and no file needs to keep them; lineages of other seeds get other
# halves.
_SPLIT_KEY = 0x63726F73  # "cros"


def halves(count: int, seed: int) -> tuple[np.ndarray, np.ndarray]:
    """Two fixed halves of the held-out indices ``0 .. count - 1``: a permutation drawn from
    ``seed``, its first ``count // 2`` indices and the rest (each sorted).

    >>> a, b = halves(5, seed=0)
    >>> sorted([*a, *b]) == [0, 1, 2, 3, 4], len(a), len(b)
    (True, 2, 3)
    """
    if not isinstance(count, int) or count < 2:
        raise ValueError(f"a held-out set needs at least 2 samples to split, but got {count!r}")
    order = np.random.default_rng(np.random.SeedSequence([int(seed), _SPLIT_KEY])).permutation(
        count
    )
    return np.sort(order[: count // 2]), np.sort(order[count // 2 :])


def choose(scores: np.ndarray, rows: np.ndarray, eligible: Sequence[bool] | None = None) -> int:
    """The candidate with the highest mean score over the samples ``rows``; ties go to the
    earlier candidate (as the lineage's and the early-stopped baseline's own choices)."""
    means = scores[:, rows].mean(axis=1)
    best, best_value = -1, -np.inf
    for candidate, value in enumerate(means):
        if eligible is not None and not eligible[candidate]:
            continue
        if value > best_value:
            best, best_value = candidate, float(value)
    if best < 0:
        raise ValueError("no eligible candidate to choose from")
    return best


@dataclass(frozen=True)
class CrossFitted:
    """The out-of-half score of every held-out sample, their mean, and the two choices."""

    scores: np.ndarray  # (samples,): each sample scored by the candidate chosen on the other half
    value: float  # the cross-fitted figure: scores.mean()
    choices: tuple[int, int]  # chosen on the first half (scores the second), on the second


def cross_fit(
    scores: np.ndarray,
    split: tuple[np.ndarray, np.ndarray],
    eligible: Sequence[bool] | None = None,
) -> CrossFitted:
    """Choose on each half of ``split``, score on the other (see the module docstring).

    ``scores`` is ``(candidates, samples)``; ``eligible`` (optional) marks the candidates that
    may be chosen (a diverged generation may not). One candidate is its own cross-fitted figure.
    """
    scores = np.asarray(scores, dtype=np.float64)
    if scores.ndim != 2 or scores.shape[0] == 0:
        raise ValueError(f"scores should be (candidates, samples), but got {scores.shape}")
    first, second = split
    on_first, on_second = choose(scores, first, eligible), choose(scores, second, eligible)
    out = np.empty(scores.shape[1])
    out[second] = scores[on_first, second]
    out[first] = scores[on_second, first]
    return CrossFitted(out, float(out.mean()), (on_first, on_second))

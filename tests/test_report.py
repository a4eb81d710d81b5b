"""Paired bootstrap of held-out gains, the stop reason in words, and reports of plain lineages."""

from __future__ import annotations

import numpy as np
import pytest
import torch
import torch.nn.functional as F
from conftest import TinyNet
from scipy import stats

import filial
from filial.metrics import accuracy, negative_mse
from filial.report import format_report, reason_in_words, summarize
from filial.stopping import paired_bootstrap


def _two_classifiers(n=400, seed=0):
    """Labels and two sets of outputs: b right 85 % of the time, a right 75 % (made here)."""
    rng = np.random.default_rng(seed)
    labels = rng.integers(0, 4, n)
    right_a, right_b = rng.random(n) < 0.75, rng.random(n) < 0.85
    wrong = (labels + 1) % 4
    a = F.one_hot(torch.from_numpy(np.where(right_a, labels, wrong)), 4).float()
    b = F.one_hot(torch.from_numpy(np.where(right_b, labels, wrong)), 4).float()
    return a, b, torch.from_numpy(labels), right_a, right_b


def test_paired_bootstrap_matches_scipy():
    """Reference: scipy.stats.bootstrap(paired=True, method='percentile') on the per-example
    correctness, the same percentile bootstrap of Efron & Tibshirani (1993)."""
    a, b, labels, right_a, right_b = _two_classifiers()
    ours = paired_bootstrap(accuracy, a, b, labels, resamples=4000, seed=1)
    reference = stats.bootstrap(
        (right_a.astype(float), right_b.astype(float)),
        lambda x, y, axis=-1: np.mean(y - x, axis=axis),
        paired=True,
        method="percentile",
        n_resamples=4000,
        confidence_level=0.95,
        random_state=2,
    ).confidence_interval
    assert ours.observed == pytest.approx(right_b.mean() - right_a.mean())
    # Two independent Monte Carlo draws of the same interval: endpoints agree to ~0.01.
    assert ours.low == pytest.approx(reference.low, abs=0.01)
    assert ours.high == pytest.approx(reference.high, abs=0.01)
    assert ours.low <= ours.observed <= ours.high


def test_general_metrics_take_the_resampling_loop():
    a, b, labels, _, _ = _two_classifiers(n=200)
    fast = paired_bootstrap(accuracy, a, b, labels, resamples=500, seed=3)
    slow = paired_bootstrap(lambda o, y: accuracy(o, y), a, b, labels, resamples=500, seed=3)
    assert (fast.low, fast.high) == pytest.approx((slow.low, slow.high))  # same draws
    regression = paired_bootstrap(
        negative_mse, a, b, F.one_hot(labels, 4).float(), resamples=200, seed=0
    )
    assert regression.low <= regression.observed <= regression.high
    with pytest.raises(ValueError, match="level"):
        paired_bootstrap(accuracy, a, b, labels, level=1.5)
    with pytest.raises(ValueError, match="same non-zero length"):
        paired_bootstrap(accuracy, a[:5], b, labels)


def test_stop_reasons_in_words():
    """The stop line says what was observed; over-regularisation only where the records show
    its signature (training fit against the labels falling while held-out falls)."""
    settings = {"min_gain": 0.0, "patience": 2, "max_generations": 4}
    words = reason_in_words({"stop": True, "reason": "no-gain", "detail": {}}, settings)
    assert words.startswith("no-gain:") and "over-regularis" not in words
    assert "no generation beat the best held-out metric by more than min_gain=0.0" in words
    decision = {
        "stop": True,
        "reason": "no-gain",
        "detail": {"last_gain": 1, "patience": 2, "min_gain": 0.0},
    }

    def records(train, heldout):
        return [
            {"generation": g, "train": t, "heldout": h}
            for g, (t, h) in enumerate(zip(train, heldout, strict=True))
        ]

    flat = reason_in_words(
        decision, settings, records([0.9, 0.8, 0.85, 0.7], [0.8, 0.9, 0.8, 0.85])
    )
    assert flat == (
        "no-gain: no generation beat generation 1 by more than min_gain=0.0 for patience=2 "
        "generations"
    )
    signature = reason_in_words(
        decision, settings, records([0.9, 0.8, 0.75, 0.7], [0.8, 0.9, 0.88, 0.85])
    )
    assert signature.startswith(flat) and "the records show over-regularisation" in signature
    assert (
        "fell at every generation (0.8000 to 0.7000) while held-out fell (0.9000 to 0.8500)"
        in signature
    )
    collapse = {"stop": True, "reason": "collapse", "detail": {"why": "99% in one class"}}
    assert "99% in one class" in reason_in_words(collapse, settings)
    assert "max_generations=4" in reason_in_words(
        {"stop": True, "reason": "max-generations", "detail": {}}, settings
    )
    assert "not finished" in reason_in_words(None, settings)


def test_report_of_a_plain_lineage(loaders, tmp_path):
    train, heldout, test = loaders
    lineage = filial.Lineage(
        TinyNet(), train, heldout, run_dir=tmp_path / "run", max_generations=1, test_loader=test
    )
    lineage.run(filial.fit_epochs(2, lambda p: torch.optim.SGD(p, lr=0.1)))
    summary = summarize(tmp_path / "run")
    assert len(summary["lineages"]) == 1
    records = summary["lineages"][0]["records"]
    assert [r["generation"] for r in records] == [0, 1]
    assert summary["tensorboard"] == f"tensorboard --logdir {tmp_path / 'run' / 'tb'}"
    text = format_report(summary)
    assert "stopped: max-generations" in text and "<- kept" in text
    with pytest.raises(ValueError, match="not a filial run directory"):
        summarize(tmp_path)


def test_report_says_when_the_matched_baseline_diverged(loaders, tmp_path):
    import json

    train, heldout, _ = loaders
    lineage = filial.Lineage(TinyNet(), train, heldout, run_dir=tmp_path / "run", max_generations=1)
    lineage.run(filial.fit_epochs(1, lambda p: torch.optim.SGD(p, lr=0.1)))
    base = lineage.matched_baseline(
        lambda n: filial.fit_epochs(n, lambda p: torch.optim.SGD(p, lr=0.1))
    )
    assert (
        base["epochs_matched"] == 2
        and not (tmp_path / "run" / "baseline" / "matched" / "gen0" / "targets.npy").exists()
    )
    path = tmp_path / "run" / "baseline" / "matched" / "baseline.json"
    path.write_text(json.dumps({**base, "heldout": None, "diverged": True}))
    assert "matched baseline (2 epochs on the labels, the last kept): diverged" in format_report(
        summarize(tmp_path / "run")
    )

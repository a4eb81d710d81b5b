"""StopRule: patience, min_gain, max_generations, collapse, divergence; best = held-out argmax."""

from __future__ import annotations

import pytest

from filial.stopping import StopRule


def _records(values, **extra):
    return [{"generation": g, "heldout": v, **extra} for g, v in enumerate(values)]


def test_keeps_going_while_held_out_improves():
    d = StopRule(max_generations=8, patience=2).decide(_records([0.80, 0.82, 0.85]))
    assert (d.stop, d.reason, d.best) == (False, None, 2)


def test_no_gain_after_patience_generations():
    rule = StopRule(max_generations=8, patience=2)
    assert not rule.decide(_records([0.80, 0.85, 0.84])).stop  # one generation without gain
    d = rule.decide(_records([0.80, 0.85, 0.84, 0.83]))
    assert (d.stop, d.reason, d.best) == (True, "no-gain", 1)
    assert d.detail["last_gain"] == 1


def test_min_gain_ignores_tiny_improvements_but_best_is_still_the_argmax():
    rule = StopRule(max_generations=8, patience=2, min_gain=0.01)
    d = rule.decide(_records([0.800, 0.805, 0.809]))
    assert (d.stop, d.reason) == (True, "no-gain")
    assert d.best == 2  # the argmax, even though it did not beat generation 0 by min_gain


def test_ties_go_to_the_earlier_generation():
    d = StopRule(max_generations=2, patience=5).decide(_records([0.9, 0.9, 0.9]))
    assert (d.stop, d.reason, d.best) == (True, "max-generations", 0)


def test_max_generations_counts_generations_after_zero():
    rule = StopRule(max_generations=2, patience=5)
    assert not rule.decide(_records([0.1, 0.2])).stop
    assert rule.decide(_records([0.1, 0.2, 0.3])).reason == "max-generations"
    assert StopRule(max_generations=0).decide(_records([0.5])).reason == "max-generations"


def test_diverged_generation_stops_and_is_never_best():
    records = _records([0.80, 0.85])
    records.append({"generation": 2, "heldout": None, "diverged": True})
    d = StopRule().decide(records)
    assert (d.stop, d.reason, d.best) == (True, "diverged", 1)
    d0 = StopRule().decide([{"generation": 0, "heldout": None, "diverged": True}])
    assert (d0.reason, d0.best) == ("diverged", None)


def test_collapse_to_one_class():
    records = _records([0.8, 0.7], label_share=0.1)
    records[0]["prediction_share"], records[1]["prediction_share"] = 0.12, 0.97
    d = StopRule(collapse_share=0.95).decide(records)
    assert (d.stop, d.reason, d.best) == (True, "collapse", 0)
    assert "97.0%" in d.detail["why"]
    # A data set whose labels are themselves 97 % one class is not a collapse.
    for r in records:
        r["label_share"] = 0.97
    assert not StopRule(collapse_share=0.95).decide(records).stop


def test_collapse_of_l2_outputs_towards_zero():
    records = _records([0.8, 0.7])
    records[0]["output_norm"], records[1]["output_norm"] = 1.0, 0.01
    d = StopRule(collapse_norm=0.05).decide(records)
    assert d.reason == "collapse" and "norm" in d.detail["why"]
    records[1]["output_norm"] = 0.5
    assert not StopRule(collapse_norm=0.05).decide(records).stop


@pytest.mark.parametrize(
    "kwargs, word",
    [
        ({"patience": 0}, "patience"),
        ({"max_generations": -1}, "max_generations"),
        ({"min_gain": float("nan")}, "min_gain"),
        ({"collapse_share": 1.5}, "collapse_share"),
    ],
)
def test_bad_settings_are_named(kwargs, word):
    with pytest.raises(ValueError, match=word):
        StopRule(**kwargs)


def test_several_bad_settings_are_reported_together():
    with pytest.raises(ValueError) as info:
        StopRule(patience=0, min_gain=-1)
    assert "patience" in str(info.value) and "min_gain" in str(info.value)

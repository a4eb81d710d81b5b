"""Baselines at matched compute, the cross-fitted estimate, and the report's verdicts.

Outside references, each named at its check: a plain training loop written here that keeps the
best epoch by hand, scored with scikit-learn's ``accuracy_score``; the definition of label
smoothing in Szegedy et al., "Rethinking the Inception Architecture for Computer Vision", CVPR
2016 (section 7), against ``torch.nn.functional.cross_entropy(label_smoothing=...)``; the
two-fold cross-fitting of a choice, computed here by hand from the held-out outputs (the
repeated-split logic of cross-validation, Hastie, Tibshirani & Friedman, "The Elements of
Statistical Learning", ch. 7).
"""

from __future__ import annotations

import copy
import json
import math
import shutil
import subprocess
import sys
from pathlib import Path

import numpy as np
import pytest
import torch
import torch.nn.functional as F
from sklearn.metrics import accuracy_score
from torch.utils.data import DataLoader

import filial
from filial import cli, recipe
from filial.baselines import baseline_names, baseline_specs
from filial.checkpoint import load_checkpoint
from filial.crossfit import cross_fit, halves
from filial.demo import MLP, mail_room
from filial.errors import InputError
from filial.losses import StudentLoss
from filial.recipe import MARKER, RecipeError
from filial.report import format_report, summarize
from filial.seeding import seed_generation

ROOT = Path(__file__).resolve().parents[1]
FIXTURES = Path(__file__).resolve().parent / "fixtures" / "format1"
ROOM = mail_room(noise=0.4, seed=0, train_size=200, heldout_size=100)
SEED = 5


def _loaders():
    train = DataLoader(ROOM.train, batch_size=32, shuffle=True, generator=torch.Generator())
    return train, DataLoader(ROOM.heldout, batch_size=64), DataLoader(ROOM.test, batch_size=256)


def _optimizer(params):
    return torch.optim.SGD(params, lr=0.2, momentum=0.9)


def _fit(epochs: int) -> filial.fit.EpochFit:
    return filial.fit_epochs(epochs, _optimizer, progress=False)


def _lineage(run_dir: Path, **kwargs) -> filial.Lineage:
    train, heldout, test = _loaders()
    options = {
        "max_generations": 1,
        "progress": False,
        "tensorboard": False,
        "seed": SEED,
        "test_loader": test,
        **kwargs,
    }
    return filial.Lineage(MLP((32,)), train, heldout, run_dir=run_dir, **options)


@pytest.fixture(scope="module")
def finished(tmp_path_factory):
    """A finished two-generation lineage (six epochs each) and its three baselines."""
    run_dir = tmp_path_factory.mktemp("baselines") / "run"
    lineage = _lineage(run_dir)
    lineage.run(_fit(6))
    found = lineage.baselines(["matched", "early-stopping", "label-smoothing"], _fit)
    lineage.close()
    return run_dir, found


def _hand_loop(epochs: int, smoothing: float = 0.0):
    """The baseline written out by hand: generation 0's start (filial's seeding of generation
    0, then a fresh model), plain SGD epochs over the user's own loader, the held-out accuracy
    after each epoch (scikit-learn), the best epoch's weights kept, ties to the earlier."""
    train, _, _ = _loaders()
    seed_generation(SEED, 0, train)
    model = MLP((32,))()
    optimizer = _optimizer(model.parameters())
    inputs, labels = ROOM.heldout.tensors
    best, best_value, best_state, curve = None, -math.inf, None, []
    for epoch in range(epochs):
        model.train()
        for x, y in train:
            loss = F.cross_entropy(model(x), y, label_smoothing=smoothing)
            optimizer.zero_grad()
            loss.backward()
            optimizer.step()
        model.eval()
        with torch.no_grad():
            value = accuracy_score(labels.numpy(), model(inputs).argmax(dim=1).numpy())
        curve.append(value)
        if value > best_value:
            best, best_value, best_state = epoch, value, copy.deepcopy(model.state_dict())
    return best, curve, best_state


@pytest.mark.parametrize("name, smoothing", [("early-stopping", 0.0), ("label-smoothing", 0.1)])
def test_the_early_stopped_baselines_equal_a_loop_that_keeps_the_best_epoch_by_hand(
    finished, name, smoothing
):
    run_dir, found = finished
    record = found[name]
    epochs = record["epochs_matched"]
    assert epochs == 12  # two generations of six epochs: the lineage's compute
    best, curve, state = _hand_loop(epochs, smoothing)
    assert record["best_epoch"] == best
    assert [e["heldout"] for e in record["epochs"]] == curve  # held-out after every epoch
    assert record["evaluated"] == list(range(epochs))
    assert 0 < best < epochs - 1  # keeping the best epoch mattered here
    assert record["heldout"] == max(curve) == curve[best]
    saved = load_checkpoint(run_dir / record["checkpoint"])
    assert saved.keys() == state.keys()
    assert all(torch.equal(saved[k], state[k]) for k in saved)  # the very same weights


def test_evaluating_every_epoch_leaves_the_training_alone(finished):
    """The early-stopped baseline trains as the matched one does (the evaluations run in eval
    mode inside a fork of the random generators): its last epoch is the matched baseline."""
    _, found = finished
    early, matched = found["early-stopping"], found["matched"]
    assert early["epochs"][-1]["heldout"] == matched["heldout"]
    assert [e["loss"] for e in early["epochs"]] == [e["loss"] for e in matched["epochs"]]
    assert "best_epoch" not in matched and matched["name"] == "matched"


def test_the_held_out_scores_of_every_evaluated_epoch_are_kept(finished):
    run_dir, found = finished
    record = found["early-stopping"]
    rows = np.load(run_dir / record["heldout_epochs"], allow_pickle=False)
    assert rows.shape == (record["epochs_matched"], len(ROOM.heldout)) and rows.dtype == np.float32
    assert rows.mean(axis=1).tolist() == pytest.approx([e["heldout"] for e in record["epochs"]])
    kept = np.load(run_dir / "baseline" / "early-stopping" / "gen0" / "heldout.npy")
    labels = ROOM.heldout.tensors[1].numpy()
    assert (kept.argmax(axis=1) == labels).tolist() == rows[record["best_epoch"]].astype(
        bool
    ).tolist()


def test_label_smoothing_is_the_published_formula():
    """F.cross_entropy(label_smoothing=eps) is (1 - eps) * CE(y) + eps * mean_k CE(k), the
    smoothed target of Szegedy et al. (CVPR 2016): the one-hot label mixed with the uniform
    distribution over the K classes. StudentLoss passes it through for the baseline."""
    g = torch.Generator().manual_seed(0)
    logits = torch.randn(32, 7, generator=g)
    labels = torch.randint(0, 7, (32,), generator=g)
    for eps in (0.05, 0.1, 0.3):
        per_class = -F.log_softmax(logits, dim=1)  # CE(k) for every class k, per sample
        hand = (1 - eps) * per_class.gather(1, labels[:, None]).squeeze(1) + eps * per_class.mean(
            dim=1
        )
        torch.testing.assert_close(
            F.cross_entropy(logits, labels, label_smoothing=eps), hand.mean()
        )
        loss = StudentLoss("ce", label_smoothing=eps)
        torch.testing.assert_close(loss(logits, labels, None), hand.mean())
    assert StudentLoss("ce")(logits, labels, None) == F.cross_entropy(logits, labels)
    with pytest.raises(ValueError, match="applies to kind='ce' only"):
        StudentLoss("l2", label_smoothing=0.1)
    with pytest.raises(ValueError, match=r"in \[0, 1\)"):
        StudentLoss("ce", label_smoothing=1.0)


def test_the_cross_fitted_estimate_by_hand():
    """Choose on one half, score on the other, both ways: computed here with loops over a
    small array of held-out outputs (3 candidates, 9 samples), against filial.crossfit."""
    rng = np.random.default_rng(7)
    outputs = rng.normal(size=(3, 9, 4))
    labels = rng.integers(0, 4, 9)
    first, second = halves(9, seed=11)
    assert sorted([*first, *second]) == list(range(9)) and (len(first), len(second)) == (4, 5)
    assert np.array_equal(halves(9, seed=11)[0], first)  # fixed: derived from the seed
    assert not np.array_equal(halves(9, seed=12)[0], first)

    def hit(c, i):
        row = list(outputs[c, i])
        return 1.0 if row.index(max(row)) == labels[i] else 0.0

    def pick(rows):  # the best mean on rows; ties to the earlier candidate
        means = [sum(hit(c, i) for i in rows) / len(rows) for c in range(3)]
        return means.index(max(means))

    chosen_first, chosen_second = pick(first), pick(second)
    by_hand = (
        sum(hit(chosen_first, i) for i in second) + sum(hit(chosen_second, i) for i in first)
    ) / 9
    scores = (outputs.argmax(axis=2) == labels).astype(float)
    fitted = cross_fit(scores, (first, second))
    assert fitted.choices == (chosen_first, chosen_second)
    assert fitted.value == pytest.approx(by_hand)
    # the two halves' scores averaged, each weighted by its size
    half_b = np.mean([hit(chosen_first, i) for i in second])
    half_a = np.mean([hit(chosen_second, i) for i in first])
    assert fitted.value == pytest.approx((5 * half_b + 4 * half_a) / 9)
    # a candidate that may not be chosen (a diverged generation) is skipped
    best_everywhere = int(scores.sum(axis=1).argmax())
    eligible = [c != best_everywhere for c in range(3)]
    assert best_everywhere not in cross_fit(scores, (first, second), eligible).choices


def test_the_report_cross_fits_the_kept_generation_and_the_early_stopped_epoch(finished):
    """The report's cross-fitted figures, recomputed by hand from the run's own files and the
    documented split (halves of the held-out set drawn from the lineage's seed)."""
    run_dir, found = finished
    summary = summarize(run_dir)["lineages"][0]
    labels = np.load(run_dir / "heldout_labels.npy")
    first, second = halves(len(labels), SEED)

    def by_hand(rows):  # rows: (candidates, samples) of 0/1 hits
        a = max(range(len(rows)), key=lambda c: (rows[c][first].mean(), -c))
        b = max(range(len(rows)), key=lambda c: (rows[c][second].mean(), -c))
        return (rows[a][second].sum() + rows[b][first].sum()) / len(labels), (a, b)

    generations = [
        np.load(run_dir / f"gen{r['generation']}" / "heldout.npy").argmax(axis=1) == labels
        for r in summary["records"]
    ]
    value, choices = by_hand([g.astype(float) for g in generations])
    assert summary["cross_fitted"]["kept"] == pytest.approx(value)
    assert summary["cross_fitted"]["choices"] == list(choices)
    record = found["early-stopping"]
    rows = np.load(run_dir / record["heldout_epochs"]).astype(float)
    value, (a, b) = by_hand(rows)
    early = next(c for c in summary["comparisons"] if c["against"] == "early-stopping")
    assert early["detail"]["cross_fitted"] == pytest.approx(value)
    assert early["detail"]["cross_fitted_epochs"] == [
        record["evaluated"][a],
        record["evaluated"][b],
    ]
    # the cross-fitted gain is the kept generation's out-of-half score minus the baseline's
    assert early["cross_fitted"]["observed"] == pytest.approx(
        summary["cross_fitted"]["kept"] - value
    )
    assert early["cross_fitted"]["low"] <= early["cross_fitted"]["observed"]
    assert early["plain"]["observed"] == pytest.approx(
        summary["records"][summary["best"]]["heldout"] - record["heldout"]
    )


def test_finished_baselines_are_reused_and_a_changed_setting_trains_only_that_one(tmp_path):
    run_dir = tmp_path / "run"
    lineage = _lineage(run_dir)
    lineage.run(_fit(2))
    names = ["early-stopping", "label-smoothing", "matched"]
    first = lineage.baselines(names, _fit, label_smoothing=0.1)
    files = {n: run_dir / "baseline" / n / "gen0" / "student.pt" for n in names}
    stamps = {n: p.stat().st_mtime_ns for n, p in files.items()}
    again = lineage.baselines(names, _fit, label_smoothing=0.1)
    assert again == first and {n: p.stat().st_mtime_ns for n, p in files.items()} == stamps
    changed = lineage.baselines(names, _fit, label_smoothing=0.2)
    assert changed["label-smoothing"]["label_smoothing"] == 0.2
    assert files["label-smoothing"].stat().st_mtime_ns != stamps["label-smoothing"]
    assert {n: files[n].stat().st_mtime_ns for n in ("early-stopping", "matched")} == {
        n: stamps[n] for n in ("early-stopping", "matched")
    }
    lineage.close()
    # a new Lineage over the run (a resume) finds them, and every=2 trains the two that use it
    lineage = _lineage(run_dir)
    every = lineage.baselines(names, _fit, label_smoothing=0.2, every=2)
    assert every["early-stopping"]["evaluated"] == [1, 3]  # after epochs 2 and 4 (the last)
    assert every["matched"] == first["matched"]
    assert files["matched"].stat().st_mtime_ns == stamps["matched"]
    lineage.close()


def test_an_interrupted_baseline_trains_again_from_its_seed(tmp_path, monkeypatch):
    """A baseline whose record was never written (the process died after its files) trains
    again from generation 0's seed, to the record and weights of an uninterrupted one."""
    straight = _lineage(tmp_path / "straight")
    straight.run(_fit(2))
    reference = straight.baseline("early-stopping", _fit)
    straight.close()

    run_dir = tmp_path / "run"
    lineage = _lineage(run_dir)
    lineage.run(_fit(2))
    import filial.baselines as baselines

    real = baselines.atomic_write_json

    def dies(path, data):
        if Path(path).name == "baseline.json":
            raise KeyboardInterrupt  # as if the process stopped right before the record
        return real(path, data)

    monkeypatch.setattr(baselines, "atomic_write_json", dies)
    with pytest.raises(KeyboardInterrupt):
        lineage.baseline("early-stopping", _fit)
    folder = run_dir / "baseline" / "early-stopping"
    assert (folder / "gen0" / "student.pt").is_file() and not (folder / "baseline.json").exists()
    monkeypatch.setattr(baselines, "atomic_write_json", real)
    record = lineage.baseline("early-stopping", _fit)
    lineage.close()

    def stable(r):
        return {k: v for k, v in r.items() if k not in ("seconds", "checkpoint")}

    assert stable(record) == stable(reference)
    assert (folder / "gen0" / "student.pt").read_bytes() == (
        tmp_path / "straight" / "baseline" / "early-stopping" / "gen0" / "student.pt"
    ).read_bytes()


def test_ties_go_to_the_earlier_epoch_and_a_custom_metric_keeps_no_scores(tmp_path):
    lineage = _lineage(tmp_path / "run", metric=lambda outputs, labels: 0.5)
    lineage.run(_fit(2))
    record = lineage.baseline("early-stopping", _fit, every=3)
    lineage.close()
    assert record["evaluated"] == [2, 3]  # after epoch 3, and after the last (4)
    assert record["best_epoch"] == 2  # every epoch ties: the first evaluated one is kept
    assert record["heldout_epochs"] is None
    assert not (tmp_path / "run" / "baseline" / "early-stopping" / "heldout_epochs.npy").exists()


def test_baseline_arguments_are_checked_before_anything_trains(tmp_path):
    lineage = _lineage(tmp_path / "run")
    with pytest.raises(RuntimeError, match="finished lineage"):
        lineage.baselines(["matched"], _fit)
    lineage.run(_fit(1))
    with pytest.raises(ValueError, match="should be one of 'none', 'early-stopping'"):
        lineage.baselines(["best"], _fit)
    with pytest.raises(ValueError, match="several settings are wrong"):
        lineage.baselines(["label-smoothing"], _fit, every=0, label_smoothing=1.5)
    with pytest.raises(ValueError, match="names a baseline twice"):
        lineage.baselines(["matched", "matched"], _fit)
    with pytest.raises(InputError, match="must return filial.fit_epochs"):
        lineage.baseline("early-stopping", lambda n: lambda gen: gen.model)
    assert lineage.baselines("none", _fit) == {}
    assert not (tmp_path / "run" / "baseline" / "early-stopping" / "baseline.json").exists()
    lineage.close()
    l2 = _lineage(tmp_path / "l2", targets="l2")
    with pytest.raises(ValueError, match="affine change of the targets"):
        l2.baselines(["early-stopping", "label-smoothing"], _fit)
    l2.close()
    assert baseline_names("matched") == ["matched"] and baseline_names([]) == []
    assert [s.name for s in baseline_specs(["matched", "early-stopping"])] == [
        "early-stopping",
        "matched",
    ]


@pytest.mark.skipif(not torch.cuda.is_available(), reason="needs a CUDA device")
def test_early_stopping_on_the_gpu(tmp_path):
    """fit_epochs(device="cuda"): the held-out passes run on the model's device, the kept
    weights come back there, the checkpoint loads on the CPU (nothing assumes the CPU)."""
    lineage = _lineage(tmp_path / "run")
    cuda = lambda n: filial.fit_epochs(n, _optimizer, progress=False, device="cuda")  # noqa: E731
    lineage.run(cuda(2))
    found = lineage.baselines(["early-stopping", "label-smoothing", "matched"], cuda)
    lineage.close()
    assert found["early-stopping"]["epochs"][-1]["heldout"] == pytest.approx(
        found["matched"]["heldout"]
    )
    state = load_checkpoint(tmp_path / "run" / found["early-stopping"]["checkpoint"])
    assert all(not t.is_cuda for t in state.values())
    summarize(tmp_path / "run")


# -- recipes ------------------------------------------------------------------------------


def test_recipe_baselines_take_a_list_and_the_old_string_forms():
    base = tomllib_loads(ROOT / "recipes" / "digits_ce.toml")
    for given, expected in [
        ("none", []),
        ("matched", ["matched"]),
        (["matched", "early-stopping"], ["early-stopping", "matched"]),
        ([], []),
    ]:
        raw = copy.deepcopy(base)
        raw["run"]["baseline"] = given
        assert recipe.resolve(raw)["run"]["baseline"] == expected
    raw = copy.deepcopy(base)
    raw["run"]["baseline"] = "best"
    with pytest.raises(RecipeError, match=r"run.baseline should be one of 'none'"):
        recipe.resolve(raw)
    # a saved recipe of earlier versions (baseline = "matched", no baseline_every) reads as
    # today's with the same meaning, and the baseline keys never refuse a resume
    old = recipe.Recipe({"run": {"name": "x", "seeds": [0], "baseline": "matched"}})
    new = recipe.resolve({**copy.deepcopy(base), "run": {**base["run"], "baseline": ["matched"]}})
    assert old.baselines() == {"baseline": ["matched"], "baseline_every": 1, "label_smoothing": 0.1}
    assert new.baselines() == {**old.baselines(), "label_smoothing": 0.1}
    assert "baseline" not in new.comparable()["run"]


def tomllib_loads(path: Path):
    import tomllib

    return tomllib.loads(path.read_text())


def test_label_smoothing_with_l2_targets_exits_2_naming_the_key(tmp_path, capsys):
    command = [
        "run",
        str(ROOT / "recipes" / "digits_l2.toml"),
        "--run-dir",
        str(tmp_path / "run"),
        "--set",
        "run.baseline=['label-smoothing']",
    ]
    assert cli.main(command) == 2
    err = capsys.readouterr().err
    assert "run.baseline = ['label-smoothing']" in err and "targets='l2'" in err
    assert not (tmp_path / "run").exists()


@pytest.mark.slow
def test_an_old_run_gets_the_new_baselines_only(tmp_path, capsys):
    """The format-1 fixture (a finished run with the matched baseline of the earlier layout)
    rerun with today's shipped recipe: the lineages and the old matched baseline are reused as
    they are; only the early-stopped baselines train; the report shows all three."""
    run = tmp_path / "recipe_run"
    shutil.copytree(FIXTURES / "recipe_run", run)
    old = {p: p.read_bytes() for p in run.rglob("student.pt")}
    code = cli.main(
        [
            "run",
            str(ROOT / "recipes" / "digits_ce.toml"),
            "--run-dir",
            str(run),
            "--set",
            "run.seeds=[0, 1]",
            "--set",
            "model.hidden=[16]",
            "--set",
            "training.epochs=2",
            "--set",
            "generations.max=1",
        ]
    )
    captured = capsys.readouterr()
    assert code == 0, captured.err
    assert "other baseline settings than the run's" in captured.err
    now = {p: p.read_bytes() for p in run.rglob("student.pt")}
    assert {p: now[p] for p in old} == old  # nothing finished was trained again
    assert sorted(str(p.relative_to(run)) for p in set(now) - set(old)) == [
        f"seed{s}/baseline/{n}/gen0/student.pt"
        for s in (0, 1)
        for n in ("early-stopping", "label-smoothing")
    ]
    assert recipe.Recipe(tomllib_loads(run / "recipe.toml")).baselines()["baseline"] == [
        "early-stopping",
        "label-smoothing",
        "matched",
    ]
    report = captured.out
    assert "matched baseline (4 epochs on the labels, the last kept)" in report
    assert "early-stopping baseline (4 epochs on the labels" in report
    assert report.count("verdict: ") == 2 and "verdict across 2 seeds: " in report


# -- the report's words -------------------------------------------------------------------

N = 200  # held-out samples of the synthetic runs below


def _one_hot(right: np.ndarray, labels: np.ndarray) -> np.ndarray:
    """Two-class outputs that are right exactly where ``right`` is True."""
    predicted = np.where(right, labels, 1 - labels)
    return np.eye(2, dtype=np.float32)[predicted]


def _record(g: int, heldout: float) -> dict:
    return {
        "generation": g,
        "teacher": None if g == 0 else g - 1,
        "mode": "labels" if g == 0 else "cached",
        "heldout": heldout,
        "test": None,
        "train": 0.9 - 0.05 * g,
        "ensemble": heldout,
        "agreement": None,
        "diverged": False,
        "checkpoint": f"gen{g}/student.pt",
        "checkpoint_sha256": "0" * 64,
        "epochs": [{"epoch": 0, "loss": 1.0}],
        "seconds": 1.0,
    }


def _synthetic_lineage(folder: Path, seed: int, hits: list[int], early: int, best: int) -> None:
    """A lineage folder as filial writes it: generations right on ``hits[g]`` of the N
    held-out samples (the first ones, so that better models contain worse ones), and an
    early-stopped baseline right on ``early`` (its one evaluated epoch)."""
    labels = np.arange(N) % 2
    folder.mkdir(parents=True)
    np.save(folder / "heldout_labels.npy", labels)
    records = []
    for g, count in enumerate(hits):
        (folder / f"gen{g}").mkdir()
        np.save(folder / f"gen{g}" / "heldout.npy", _one_hot(np.arange(N) < count, labels))
        records.append(_record(g, count / N))
    settings = {"targets": "ce", "metric": "default", "seed": seed}
    decision = {"stop": True, "reason": "no-gain", "best": best, "detail": {"last_gain": best}}
    decision["detail"].update(patience=2, min_gain=0.0)
    state = {"format": "filial.lineage/1", "settings": settings, "records": records}
    (folder / "lineage.json").write_text(json.dumps({**state, "decision": decision}))
    base = folder / "baseline" / "early-stopping"
    (base / "gen0").mkdir(parents=True)
    right = np.arange(N) < early
    np.save(base / "gen0" / "heldout.npy", _one_hot(right, labels))
    np.save(base / "heldout_epochs.npy", right[None].astype(np.float32))
    record = {
        **_record(0, early / N),
        "kind": "early-stopping-baseline",
        "name": "early-stopping",
        "epochs_matched": 4,
        "every": 1,
        "best_epoch": 3,
        "evaluated": [3],
        "heldout_epochs": "baseline/early-stopping/heldout_epochs.npy",
        "checkpoint": "baseline/early-stopping/gen0/student.pt",
    }
    (base / "baseline.json").write_text(json.dumps(record))


def _synthetic_run(folder: Path, lineages: dict[int, tuple[list[int], int, int]]) -> Path:
    folder.mkdir()
    seeds = sorted(lineages)
    (folder / "recipe.toml").write_text(f"{MARKER}\n\n[run]\nseeds = {seeds}\n")
    for seed, (hits, early, best) in lineages.items():
        _synthetic_lineage(folder / f"seed{seed}", seed, hits, early, best)
    return folder


def _lines(text: str, start: str) -> list[str]:
    return [line for line in text.splitlines() if line.startswith(start)]


def test_verdicts_say_established_inconclusive_or_worse_per_seed_and_across(tmp_path):
    run = _synthetic_run(
        tmp_path / "run",
        {
            0: ([150, 190], 150, 1),  # 40 more right than early stopping: established
            1: ([150, 160], 158, 1),  # 2 more right: inconclusive
            2: ([150, 140, 145], 180, 0),  # early stopping 30 better than generation 0 (kept)
        },
    )
    summary = summarize(run)
    text = format_report(summary)
    verdicts = _lines(text, "verdict: ")
    assert verdicts[0].startswith("verdict: generations beat early stopping: by +0.2000 over")
    assert "established on 200 held-out samples" in verdicts[0]
    assert verdicts[1].startswith("verdict: not established that generations beat early stopping")
    assert verdicts[1].endswith("inconclusive on 200 held-out samples")
    assert verdicts[2].startswith(
        "verdict: the lineage (generation 0 kept) did not beat early stopping: early-stopping "
        "did better by 0.1500"
    )
    assert [x["verdict"]["status"] for x in summary["lineages"]] == [
        "established",
        "inconclusive",
        "worse",
    ]
    # across seeds: the mean gain over early stopping, (40 + 2 - 30) / 3 / 200 = +0.02, with
    # seeds that disagree: the interval draws seeds as well as samples, so it is not established
    (across,) = _lines(text, "verdict across 3 seeds: ")
    assert across.startswith("verdict across 3 seeds: not established that generations beat")
    assert "+0.0200 over early-stopping" in across
    assert across.endswith("inconclusive on 200 held-out samples (3 seeds)")
    assert summary["across"]["verdict"]["status"] == "inconclusive"
    early = summary["across"]["comparisons"][1]
    assert early["against"] == "early-stopping" and early["seeds"] == 3
    assert early["cross_fitted"]["per_seed"] == pytest.approx([0.2, 0.01, -0.15])
    # three seeds that agree: established across seeds
    agree = _synthetic_run(tmp_path / "agree", {s: ([150, 190 - 5 * s], 150, 1) for s in range(3)})
    (across,) = _lines(format_report(summarize(agree)), "verdict across 3 seeds: ")
    assert across.startswith("verdict across 3 seeds: generations beat early stopping: by +0.1")
    assert across.endswith("established on 200 held-out samples (3 seeds)")
    # seed 1: +0.05 over generation 0 (10 samples of 200) is established, +0.01 over early
    # stopping (2 samples) is not
    table = text.split("seed 1 (")[1].split("seed 2 (")[0]
    rows = {line.split()[0]: line.split()[-1] for line in _lines(table, "  e")}
    (first,) = _lines(table, "  generation 0")
    rows["generation 0"] = first.split()[-1]
    assert rows == {"early-stopping": "inconclusive", "generation 0": "established"}
    # generation 2 was reached by seed 2 alone: its spread is "-", and the report says so
    generation_two = next(line for line in text.splitlines() if line.startswith("   2   1/3"))
    assert "+-" not in generation_two and generation_two.rstrip().endswith("-")
    assert "generation 2: reached by 1 of 3 seeds" in text
    assert summary["generations"][2]["heldout_std"] is None
    json.dumps(summary)  # filial report --json carries the same facts


def test_a_verdict_without_baselines_and_with_generation_0_kept(tmp_path):
    run = _synthetic_run(tmp_path / "run", {0: ([160, 150], 0, 0)})
    shutil.rmtree(run / "seed0" / "baseline")
    text = format_report(summarize(run))
    assert "generation 0 was kept: no later generation beat it on held-out data" in text
    assert _lines(text, "verdict: ") == [
        "verdict: generation 0 was kept: no later generation beat it on held-out data, so "
        "generations did not help in this lineage"
    ]
    run = _synthetic_run(tmp_path / "run2", {0: ([150, 153], 0, 1)})
    shutil.rmtree(run / "seed0" / "baseline")
    (verdict,) = _lines(format_report(summarize(run)), "verdict: ")
    assert verdict.startswith("verdict: not established that generations beat generation 0:")
    assert verdict.endswith("inconclusive on 200 held-out samples")


def test_the_matched_line_says_what_more_epochs_did(finished, tmp_path):
    """Below generation 0 beyond the interval: "more epochs on the labels overfit"."""
    run_dir, found = finished
    copy_dir = tmp_path / "run"
    shutil.copytree(run_dir, copy_dir)
    matched = copy_dir / "baseline" / "matched" / "gen0" / "heldout.npy"
    labels = np.load(copy_dir / "heldout_labels.npy")
    np.save(matched, np.eye(10, dtype=np.float32)[(labels + 1) % 10])  # wrong everywhere
    text = format_report(summarize(copy_dir))
    line = next(x for x in text.splitlines() if x.startswith("matched baseline ("))
    assert "below generation 0" in line and "more epochs on the labels overfit" in line


# -- two ranks ----------------------------------------------------------------------------


@pytest.mark.slow
def test_the_early_stopped_baseline_under_two_ranks(tmp_path):
    from baseline_jobs import baseline_job
    from distributed_jobs import run

    zero, one = run(baseline_job, tmp_path)
    for name in ("early-stopping", "matched"):
        assert json.dumps(zero[name], sort_keys=True) == json.dumps(one[name], sort_keys=True)
        saved = json.loads((tmp_path / "run" / "baseline" / name / "baseline.json").read_text())
        assert json.dumps(saved, sort_keys=True) == json.dumps(zero[name], sort_keys=True)
    early, matched = zero["early-stopping"], zero["matched"]
    curve = [e["heldout"] for e in early["epochs"]]
    assert early["best_epoch"] == curve.index(max(curve))  # the first best epoch
    assert early["heldout"] == max(curve) and curve[-1] == matched["heldout"]
    # the kept weights score the whole held-out set as recorded (scikit-learn's accuracy)
    room = mail_room(noise=0.3, seed=0, train_size=301, heldout_size=151)
    model = MLP((16,))()
    model.load_state_dict(load_checkpoint(tmp_path / "run" / early["checkpoint"]))
    inputs, labels = room.heldout.tensors
    with torch.no_grad():
        predicted = model(inputs).argmax(dim=1).numpy()
    assert accuracy_score(labels.numpy(), predicted) == pytest.approx(early["heldout"])
    rows = np.load(tmp_path / "run" / early["heldout_epochs"])
    assert rows.shape == (len(curve), 151)


# -- a crash (a real SIGKILL) -------------------------------------------------------------

CRASH_RECIPE = """
[run]
name = "crash"
seeds = [0]
baseline = ["early-stopping", "matched"]

[data]
factory = "filial.demo:mail_room_loaders"
train_size = 300
heldout_size = 150

[model]
factory = "filial.demo:mlp"
hidden = [32]

[training]
epochs = 3
lr = 0.1

[generations]
max = 1
patience = 5
"""


def _filial(recipe_path: Path, run_dir: Path, fault: str | None = None):
    import os

    env = {k: v for k, v in os.environ.items() if k != "FILIAL_FAULT"}
    if fault:
        env["FILIAL_FAULT"] = fault
    command = [sys.executable, "-m", "filial", "run", str(recipe_path), "--run-dir", str(run_dir)]
    return subprocess.run(command, capture_output=True, text=True, env=env, timeout=300)


@pytest.fixture(scope="module")
def crash_reference(tmp_path_factory):
    """The run directory of an uninterrupted run of the crash recipe."""
    folder = tmp_path_factory.mktemp("crash")
    recipe_path = folder / "crash.toml"
    recipe_path.write_text(CRASH_RECIPE)
    done = _filial(recipe_path, folder / "reference")
    assert done.returncode == 0, done.stderr
    return folder / "reference"


@pytest.mark.slow
@pytest.mark.parametrize(
    "fault",
    ["batch:gen0#20", "write:early-stopping/heldout_epochs.npy"],
    ids=["during the early-stopped baseline's training", "while its scores are written"],
)
def test_sigkill_in_a_baseline_then_the_same_command_finishes_it(tmp_path, fault, crash_reference):
    import signal

    recipe_path = tmp_path / "crash.toml"
    recipe_path.write_text(CRASH_RECIPE)
    killed = _filial(recipe_path, tmp_path / "run", fault=fault)
    assert killed.returncode == -signal.SIGKILL, killed.stderr
    lineage = (tmp_path / "run" / "seed0" / "lineage.json").read_bytes()
    assert not (
        tmp_path / "run" / "seed0" / "baseline" / "early-stopping" / "baseline.json"
    ).exists()
    rerun = _filial(recipe_path, tmp_path / "run")
    assert rerun.returncode == 0, rerun.stderr
    assert (tmp_path / "run" / "seed0" / "lineage.json").read_bytes() == lineage
    for name in ("early-stopping", "matched"):
        got, want = (
            json.loads((root / "seed0" / "baseline" / name / "baseline.json").read_text())
            for root in (tmp_path / "run", crash_reference)
        )
        assert {k: v for k, v in got.items() if k != "seconds"} == {
            k: v for k, v in want.items() if k != "seconds"
        }
    assert not list((tmp_path / "run").rglob(".*.tmp-*"))

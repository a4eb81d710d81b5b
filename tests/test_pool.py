"""The unlabelled pool (filial.pool): selection rules, class balancing, the pool loss, mixed
batches, records, refusals and resume; scikit-learn's SelfTrainingClassifier as the outside
reference of the classic form."""

from __future__ import annotations

import json
import warnings
from pathlib import Path

import numpy as np
import pytest
import torch
import torch.nn.functional as F
from conftest import TinyNet, blobs
from torch import nn
from torch.utils.data import DataLoader, Dataset, TensorDataset

import filial
from filial.errors import InputError
from filial.losses import StudentLoss, TopKTargets, soft_cross_entropy
from filial.pool import NO_LABEL, Admission, PoolLoss, balanced, select

ROOT = Path(__file__).resolve().parents[1]


class Inputs(Dataset):
    """A pool of bare inputs (no second item)."""

    def __init__(self, tensor):
        self.tensor = tensor

    def __len__(self):
        return len(self.tensor)

    def __getitem__(self, i):
        return self.tensor[i]


def _pool_loader(n=60, seed=4, pairs=False, batch_size=16, single=False):
    data = blobs(n, seed=seed)
    dataset = data if pairs else Inputs(data.tensors[0])
    if single:  # TensorDataset(inputs): 1-tuples
        dataset = TensorDataset(data.tensors[0])
    return DataLoader(dataset, batch_size=batch_size)


def _lineage(loaders, run_dir, pool, **kwargs):
    train, heldout, test = loaders
    options = {"max_generations": 2, "patience": 5, "test_loader": test, "progress": False}
    options["tensorboard"] = False
    options.update(kwargs)
    return filial.Lineage(
        TinyNet(), train, heldout, run_dir=run_dir, unlabeled_loader=pool, **options
    )


def _hook(lineage, epochs=2, seen=None):
    for gen in lineage:
        model = gen.model
        opt = torch.optim.SGD(model.parameters(), lr=0.1)
        for epoch in range(epochs):
            rows = pool_rows = 0
            for inputs, labels, targets in gen.loader:
                loss = gen.loss(model(inputs), labels, targets)
                opt.zero_grad()
                loss.backward()
                opt.step()
                rows += len(labels)
                pool_rows += int((labels == NO_LABEL).sum())
            if seen is not None and epoch == 0:
                seen.append((rows, pool_rows))
        gen.finish(model)
    return lineage.result


# -- selection (pure functions) ------------------------------------------------------------------


def test_threshold_is_strict_and_skips_held_samples():
    confidence = np.array([0.9, 0.95, 0.5, 0.9000001, 0.99], dtype=np.float32)
    predicted = np.zeros(5, dtype=np.int64)
    rule = Admission(select="threshold", threshold=0.9)
    # scikit-learn's SelfTrainingClassifier: ``selected = max_proba > self.threshold``.
    assert select(rule, confidence, predicted, 1, np.zeros(0, np.int64), 1).tolist() == [1, 3, 4]
    assert select(rule, confidence, predicted, 1, np.array([4]), 1).tolist() == [1, 3]


def test_top_breaks_ties_by_lower_index_and_growing_share():
    confidence = np.array([0.5, 0.8, 0.8, 0.9, 0.1, 0.8], dtype=np.float32)
    predicted = np.zeros(6, dtype=np.int64)
    none = np.zeros(0, np.int64)
    top = Admission(select="top", count=3)
    assert select(top, confidence, predicted, 1, none, 1).tolist() == [1, 2, 3]
    grow = Admission(select="growing", step=0.34)
    # student 1: round(0.34 * 6) = 2 most confident; student 2: round(0.68 * 6) = 4.
    assert select(grow, confidence, predicted, 1, none, 1).tolist() == [1, 3]
    assert select(grow, confidence, predicted, 2, none, 1).tolist() == [1, 2, 3, 5]
    # stay: the held samples count towards the share, the rest are the next most confident
    assert select(grow, confidence, predicted, 2, np.array([1, 3]), 1).tolist() == [2, 5]
    assert len(select(Admission(select="everything"), confidence, predicted, 1, none, 1)) == 6


def test_noisy_student_balancing_against_a_hand_computation():
    """Xie et al. 2020 (Noisy Student), section 3: per class the most confident images; classes
    short of the count are duplicated, the others cut to the most confident. Hand computation:
    class 0 has 5 candidates (cut to the 3 most confident: 0.99, 0.9, 0.8 -> samples 3, 0, 6),
    class 1 has 1 (duplicated three times), class 2 has 2 (0.7 then 0.6, cycled: 5, 7, 5), class
    3 has none (absent)."""
    confidence = np.array([0.9, 0.6, 0.3, 0.99, 0.2, 0.7, 0.8, 0.6, 0.4], dtype=np.float32)
    predicted = np.array([0, 1, 0, 0, 0, 2, 0, 2, 0])
    chosen = balanced(confidence, predicted, np.arange(9), 3, classes=4)
    assert sorted(chosen.tolist()) == sorted([3, 0, 6, 1, 1, 1, 5, 7, 5])
    assert np.bincount(predicted[chosen], minlength=4).tolist() == [3, 3, 3, 0]
    # with a threshold, sample 1 (0.6) and 7 (0.6) drop out: class 1 gets none, class 2 is 5x3
    rule = Admission(select="per_class", count=3, threshold=0.65)
    found = select(rule, confidence, predicted, 1, np.zeros(0, np.int64), 4)
    assert sorted(found.tolist()) == sorted([3, 0, 6, 5, 5, 5])


def test_admission_settings_are_checked():
    assert Admission().problems() == []
    bad = Admission(select="most", threshold=1.5, count=0, step=0, weight=-1, keep="x")
    text = " ".join(str(p) for p in bad.problems())
    for word in ("select", "threshold", "step", "weight", "keep"):
        assert word in text
    assert Admission(select="top").problems()  # no count


# -- the loss ------------------------------------------------------------------------------------


def test_pool_loss_against_torch_functional():
    torch.manual_seed(0)
    outputs, teacher = torch.randn(6, 4), torch.randn(6, 4)
    labels = torch.tensor([0, 3, NO_LABEL, 1, NO_LABEL, 2])
    base = StudentLoss("ce", temperature=2.0, label_weight=0.25)
    pool = labels == NO_LABEL
    # labelled rows: the lineage's loss (its own formula, torch.nn.functional per row)
    soft = torch.stack(
        [soft_cross_entropy(outputs[i : i + 1], teacher[i : i + 1], 2.0) for i in range(6)]
    )
    hard_label = F.cross_entropy(outputs, labels.clamp(min=0), reduction="none")
    labelled = 0.75 * soft + 0.25 * hard_label
    soft_loss = PoolLoss(base, Admission(weight=0.5))(outputs, labels, teacher)
    expected = torch.where(pool, 0.5 * soft, labelled).mean()
    assert torch.allclose(soft_loss, expected, atol=1e-6)
    hard = PoolLoss(base, Admission(weight=2.0, pseudo="hard"))(outputs, labels, teacher)
    pseudo = F.cross_entropy(outputs, teacher.argmax(dim=1), reduction="none")
    assert torch.allclose(hard, torch.where(pool, 2.0 * pseudo, labelled).mean(), atol=1e-6)
    # no pool rows: exactly the lineage's loss; generation 0: the labels
    known = labels.clamp(min=0)
    plain = PoolLoss(base, Admission())(outputs, known, teacher)
    assert torch.allclose(plain, base(outputs, known, teacher), atol=1e-6)
    assert torch.allclose(PoolLoss(base, Admission())(outputs, known, None), F.cross_entropy(
        outputs, known
    ))
    # top-k targets: the class kept first is the hard pseudo-label
    values, classes = teacher.topk(2, dim=1)
    unlabelled = torch.full((6,), NO_LABEL)
    hard_loss = PoolLoss(base, Admission(pseudo="hard"))
    top = hard_loss(outputs, unlabelled, TopKTargets(values, classes))
    assert torch.allclose(top, pseudo.mean(), atol=1e-6)


def test_the_report_says_when_generation_0_was_kept():
    from filial.pool import pool_lines

    figures = {
        "size": 10, "trained_on": 0, "admitted": 4, "share": 0.4, "new": 4,
        "mean_confidence": 0.9, "agreement": None, "audit_accuracy": 0.75,
        "audit_pool_accuracy": 0.6,
    }
    records = [{"generation": 0, "pool": figures}, {"generation": 1, "pool": figures}]
    text = "\n".join(pool_lines(records, best=0))
    assert "unlabelled pool (10 samples)" in text and "0.750" in text
    assert "generation 0 (the labelled data alone) was kept: self-training" in text
    assert "trained with 0" not in "\n".join(pool_lines(records, best=1))
    assert "trained on no pool sample" in "\n".join(pool_lines(records, best=1))
    records[1]["pool"] = {**figures, "trained_on": 4}
    assert "generation 1, trained with 4 pseudo-labelled" in "\n".join(pool_lines(records, 1))
    assert pool_lines([{"generation": 0}], best=0) == []


# -- refusals ------------------------------------------------------------------------------------


def test_bad_pools_are_refused_before_anything_is_written(loaders, tmp_path):
    run = tmp_path / "run"
    with pytest.raises(InputError, match="at least one sample"):
        _lineage(loaders, run, DataLoader(Inputs(torch.zeros(0, 5)), batch_size=4))
    with pytest.raises(ValueError, match="needs an unlabeled_loader"):
        _lineage(loaders, run, None, admission=Admission())
    with pytest.raises(ValueError, match="targets=.ce."):
        _lineage(loaders, run, _pool_loader(), targets="l2")
    with pytest.raises(ValueError, match="teacher_mode='online' with a pool"):
        _lineage(loaders, run, _pool_loader(), teacher_mode="online")
    with pytest.raises(InputError, match="pairs"):
        _lineage(loaders, run, _pool_loader(), admission=Admission(audit=True))
    floats = DataLoader(TensorDataset(torch.zeros(8, 5), torch.zeros(8)), batch_size=4)
    with pytest.raises(InputError, match="integer class labels"):
        _lineage(loaders, run, floats, admission=Admission(audit=True))
    train, heldout, test = loaders
    own = DataLoader(train.dataset, batch_sampler=[[0, 1], [2, 3]])
    with pytest.raises(InputError, match="builds its sampler"):
        _lineage((own, heldout, test), run, _pool_loader())
    assert not run.exists()


@pytest.mark.parametrize("form", ["bare", "single", "pair"])
def test_pools_of_inputs_1_tuples_or_pairs_give_tensor_batches(loaders, tmp_path, form):
    pool = _pool_loader(n=20, pairs=form == "pair", single=form == "single")
    lineage = _lineage(loaders, tmp_path / "run", pool, admission=Admission(select="everything"))
    gens = iter(lineage)
    gen0 = next(gens)
    gen0.finish(gen0.model)
    gen1 = next(gens)
    batches = list(gen1.loader)
    inputs = torch.cat([b[0] for b in batches])
    labels = torch.cat([b[1] for b in batches])
    assert inputs.shape == (96 + 20, 5) and int((labels == NO_LABEL).sum()) == 20
    # the pool rows' inputs are the pool's, each once
    pool_rows = inputs[labels == NO_LABEL]
    expected = blobs(20, seed=4).tensors[0]
    assert torch.equal(pool_rows[pool_rows[:, 0].argsort()], expected[expected[:, 0].argsort()])
    lineage.close()


def test_top_k_pool_targets_carry_the_teachers_class_first(loaders, tmp_path):
    rule = Admission(select="everything", pseudo="hard")
    lineage = _lineage(loaders, tmp_path / "run", _pool_loader(n=20), admission=rule, top_k=2,
                       store_dtype="float32")  # (another say_once key than test_topk.py)
    gens = iter(lineage)
    gen0 = next(gens)
    gen0.finish(gen0.model)
    gen1 = next(gens)
    scores = np.load(tmp_path / "run" / "gen0" / "pool" / "scores.npy")
    gen1.loader.loader.batch_sampler.sampler = torch.utils.data.SequentialSampler(range(116))
    classes = []
    for _, labels, targets in gen1.loader:
        assert isinstance(targets, TopKTargets)
        classes.append(targets.classes[labels == NO_LABEL, 0])
    # the hard pseudo-label is the class kept first; its one-hot row's value is 1
    assert torch.cat(classes).tolist() == scores["predicted"].tolist()
    lineage.close()


def test_damaged_pool_files_are_refused_on_resume(loaders, tmp_path):
    lineage = _lineage(loaders, tmp_path / "run", _pool_loader(n=20))
    gen0 = next(iter(lineage))
    gen0.finish(gen0.model)
    lineage.close()
    (tmp_path / "run" / "gen0" / "pool" / "admitted.npy").write_bytes(b"damaged")
    again = _lineage(loaders, tmp_path / "run", _pool_loader(n=20))
    with pytest.raises(InputError, match="pool files of generation 0 .* damaged"):
        next(iter(again))
    again.close()


def test_batch_ratio_fixes_the_pool_rows_of_every_batch(loaders, tmp_path):
    rule = Admission(select="everything", batch_ratio=1.0)
    lineage = _lineage(loaders, tmp_path / "run", _pool_loader(n=20), admission=rule)
    gens = iter(lineage)
    gen0 = next(gens)
    gen0.finish(gen0.model)
    gen1 = next(gens)
    pool_inputs = blobs(20, seed=4).tensors[0]
    seen = []
    for _ in range(2):
        batches = list(gen1.loader)
        # batch 16 at one pool row per labelled row: 8 + 8; the epoch ends with the labels
        assert [len(b[1]) for b in batches] == [16] * 12
        assert all(int((b[1] == NO_LABEL).sum()) == 8 for b in batches)
        labelled = torch.cat([b[0][b[1] != NO_LABEL] for b in batches])
        assert len(labelled) == 96 and len(torch.unique(labelled, dim=0)) == 96
        seen += [b[0][b[1] == NO_LABEL] for b in batches]
    # the pool's 20 samples in shuffled cycles: the first 20 pool rows are all different ones
    rows = torch.cat(seen)
    assert len(torch.unique(rows[:20], dim=0)) == 20
    assert len(torch.unique(rows, dim=0)) == 20 and all(
        any(torch.equal(r, p) for p in pool_inputs) for r in rows[:20]
    )
    lineage.close()
    with pytest.raises(ValueError, match="batch_ratio must be None or > 0"):
        _lineage(loaders, tmp_path / "other", _pool_loader(), admission=Admission(batch_ratio=0))


def test_a_training_label_of_minus_one_is_named(tmp_path):
    data = blobs(40, seed=1)
    labels = data.tensors[1].clone()
    labels[5] = NO_LABEL
    train = DataLoader(TensorDataset(data.tensors[0], labels), batch_size=8)
    heldout = DataLoader(blobs(20, seed=2), batch_size=8)
    with pytest.raises(InputError, match="'no label'"):
        _lineage((train, heldout, None), tmp_path / "run", _pool_loader())
    assert not (tmp_path / "run").exists()


# -- the engine, end to end ----------------------------------------------------------------------


@pytest.mark.slow
def test_epochs_cover_labelled_and_admitted_samples_and_records(loaders, tmp_path):
    pool = _pool_loader(n=60, pairs=True)
    seen: list[tuple[int, int]] = []
    rule = Admission(select="top", count=20, keep="stay", audit=True)
    result = _hook(_lineage(loaders, tmp_path / "run", pool, admission=rule), seen=seen)
    records = result.records
    assert [r["generation"] for r in records] == [0, 1, 2]
    # generation 0 on labels only; then each labelled sample and each admitted slot once
    assert seen[0] == (96, 0)
    assert seen[1] == (96 + 20, 20) and seen[2] == (96 + 40, 40)
    figures = [r["pool"] for r in records]
    assert [f["admitted"] for f in figures] == [20, 40, 60]
    assert [f["new"] for f in figures] == [20, 20, 20]
    assert [f["trained_on"] for f in figures] == [0, 20, 40]
    assert figures[0]["agreement"] is None and 0 <= figures[1]["agreement"] <= 1
    assert sum(figures[0]["per_class"]) == 20 and figures[0]["share"] == pytest.approx(20 / 60)
    # audit: against the pool's true labels, recomputed here from the written files
    run = tmp_path / "run"
    truth = pool.dataset.tensors[1].numpy()
    admitted = np.load(run / "gen1" / "pool" / "admitted.npy")
    index, label = admitted["index"], admitted["label"]
    assert figures[1]["audit_accuracy"] == pytest.approx(float((label == truth[index]).mean()))
    # stay: the first 20 kept their labels from generation 0
    first = np.load(run / "gen0" / "pool" / "admitted.npy")
    kept = np.isin(index, first["index"])
    assert np.array_equal(label[kept], first["label"])
    # the settings record the pool; a changed pool is refused on resume
    saved = json.loads((run / "lineage.json").read_text())["settings"]["pool"]
    assert saved["size"] == 60 and saved["select"] == "top"
    with pytest.raises(InputError, match="pool"):
        _lineage(loaders, run, _pool_loader(n=60, seed=9, pairs=True), admission=rule)
    with pytest.raises(InputError, match="pool"):
        _lineage(loaders, run, None)


def _logistic(**kwargs):
    from sklearn.linear_model import LogisticRegression

    return LogisticRegression(C=1.0, tol=1e-10, max_iter=10_000, **kwargs)


def _digits_split():
    from sklearn.datasets import load_digits

    x, y = load_digits(return_X_y=True)
    keep = y < 4
    x, y = (x[keep] / 16.0).astype(np.float32), y[keep]
    order = np.random.default_rng(0).permutation(len(x))
    x, y = x[order], y[order]
    first = np.concatenate([np.flatnonzero(y == c)[:4] for c in range(4)])  # 16 labels
    rest = np.setdiff1d(np.arange(len(x)), first)
    return x[first], y[first], x[rest[:300]], x[rest[300:400]], y[rest[300:400]]


def _sklearn_hook(lineage):
    """Hook mode: fit scikit-learn's LogisticRegression on gen.loader's batches (pool rows take
    their hard pseudo-label), wrap its coefficients in an nn.Linear."""
    for gen in lineage:
        xs, ys = [], []
        for inputs, labels, targets in gen.loader:
            labels = labels.clone()
            if targets is not None:
                pool = labels == NO_LABEL
                labels[pool] = targets.argmax(dim=1)[pool]
            xs.append(inputs)
            ys.append(labels)
        fitted = _logistic().fit(torch.cat(xs).numpy(), torch.cat(ys).numpy())
        model = nn.Linear(64, 4)
        with torch.no_grad():
            model.weight.copy_(torch.from_numpy(fitted.coef_))
            model.bias.copy_(torch.from_numpy(fitted.intercept_))
        gen.finish(model)


@pytest.mark.slow
@pytest.mark.parametrize("criterion", ["threshold", "k_best"])
def test_classic_form_admits_what_scikit_learns_self_training_records(tmp_path, criterion):
    """scikit-learn's ``SelfTrainingClassifier`` (sklearn/semi_supervised/_self_training.py):
    iteration n fits on the samples labelled so far, then labels the remaining ones whose top
    probability is ``> threshold`` (or the ``k_best`` most confident) and records n in
    ``labeled_iter_``; they keep that label. Here generation g is its iteration g + 1: the
    samples generation g admits are those with ``labeled_iter_ == g + 1``, and the last
    generation is its final estimator (same predictions). Both fit the same float32 arrays in
    the same order (labelled samples, then admitted pool samples by index: a sequential
    training loader), and no two confidences tie at the cut."""
    from sklearn.semi_supervised import SelfTrainingClassifier

    x_lab, y_lab, x_pool, x_test, _ = _digits_split()
    rounds = 3
    rule = {"threshold": {"threshold": 0.8}, "k_best": {"k_best": 40}}[criterion]
    reference = SelfTrainingClassifier(
        _logistic(), criterion=criterion, max_iter=rounds, **rule
    )
    with warnings.catch_warnings():
        warnings.simplefilter("ignore")
        reference.fit(
            np.concatenate([x_lab, x_pool]), np.concatenate([y_lab, np.full(len(x_pool), -1)])
        )
    assert reference.termination_condition_ == "max_iter"
    admission = (
        Admission(select="threshold", threshold=0.8, keep="stay", pseudo="hard")
        if criterion == "threshold"
        else Admission(select="top", count=40, keep="stay", pseudo="hard")
    )
    train = DataLoader(TensorDataset(torch.from_numpy(x_lab), torch.from_numpy(y_lab)), 8)
    heldout = DataLoader(TensorDataset(torch.from_numpy(x_test), torch.zeros(100).long()), 50)
    lineage = filial.Lineage(
        lambda: nn.Linear(64, 4),
        train,
        heldout,
        run_dir=tmp_path / "run",
        unlabeled_loader=DataLoader(Inputs(torch.from_numpy(x_pool)), batch_size=64),
        admission=admission,
        max_generations=rounds,
        patience=rounds + 1,
        progress=False,
        tensorboard=False,
    )
    _sklearn_hook(lineage)
    records = lineage.result.records
    assert len(records) == rounds + 1
    in_pool = reference.labeled_iter_[len(x_lab) :]
    earlier = np.zeros(0, dtype=np.int64)
    for g in range(rounds):
        admitted = np.load(tmp_path / "run" / f"gen{g}" / "pool" / "admitted.npy")
        index, label = admitted["index"], admitted["label"]
        new = np.setdiff1d(index, earlier)
        assert new.tolist() == np.flatnonzero(in_pool == g + 1).tolist(), g
        assert np.array_equal(label, reference.transduction_[len(x_lab) + index])
        earlier = index
    last = lineage.result.checkpoint(rounds)
    model = nn.Linear(64, 4)
    model.load_state_dict(torch.load(last, weights_only=True))
    ours = model(torch.from_numpy(x_test)).argmax(dim=1).numpy()
    assert np.array_equal(ours, reference.predict(x_test))


# -- recipes -------------------------------------------------------------------------------------


def _run_recipe(name, run_dir, overrides, capsys):
    from filial import cli

    argv = ["run", str(ROOT / "recipes" / name), "--run-dir", str(run_dir)]
    for key, value in overrides.items():
        argv += ["--set", f"{key}={value}"]
    assert cli.main(argv) == 0, capsys.readouterr().err
    return capsys.readouterr().out


@pytest.mark.slow
def test_digits_unlabeled_recipe_runs(tmp_path, capsys):
    overrides = {
        "data.labels": 40,
        "data.train_size": 240,
        "data.heldout_size": 100,
        "training.epochs": 3,
        "generations.max_generations": 1,
        "run.seeds": "[0]",
        "pool.select": "top",
        "pool.count": 50,
    }
    out = _run_recipe("digits_unlabeled.toml", tmp_path / "run", overrides, capsys)
    state = json.loads((tmp_path / "run" / "seed0" / "lineage.json").read_text())
    assert state["settings"]["pool"]["size"] == 200 and state["settings"]["pool"]["audit"]
    figures = [r["pool"] for r in state["records"]]
    assert figures[1]["trained_on"] == figures[0]["admitted"] == 50
    assert figures[0]["audit_accuracy"] is not None
    assert "unlabelled pool (200 samples)" in out


@pytest.mark.slow
def test_cifar10_unlabeled_recipe_runs_over_fake_data(tmp_path, capsys, monkeypatch):
    """As tests/test_vision.py runs the CIFAR recipes: FakeData, the real transforms and the
    shallowest ResNet; FakeData's random labels may collapse generation 0, a stop turned off."""
    from filial.stopping import StopRule

    monkeypatch.setattr(StopRule, "collapsed", lambda self, record, first: None)
    overrides = {
        "data.source": "fake",
        "data.labels": 32,
        "data.pool_size": 32,
        "data.heldout_size": 16,
        "data.test_subset": 16,
        "data.batch_size": 16,
        "data.workers": 0,
        "model.depth": 8,
        "training.epochs": 1,
        "generations.max_generations": 1,
        "generations.views": 2,
        "run.baseline": "none",
        "pool.threshold": 0.0,
        "pool.select": "everything",
    }
    _run_recipe("cifar10_unlabeled.toml", tmp_path / "run", overrides, capsys)
    state = json.loads((tmp_path / "run" / "seed0" / "lineage.json").read_text())
    assert [r["mode"] for r in state["records"]] == ["labels", "cached"]
    assert state["settings"]["pool"]["replayed"]  # the pool augments: replayed views
    assert state["records"][1]["pool"]["trained_on"] == 32
    store = filial.TargetStore(tmp_path / "run" / "seed0" / "gen1" / "pool")
    assert store.shape == (32, 2, 10)


def test_tensorboard_shows_the_pool_figures(tmp_path):
    """Read back with TensorBoard's own EventAccumulator."""
    from tensorboard.backend.event_processing.event_accumulator import EventAccumulator

    from filial.tb import TensorBoardLog

    pool = {"trained_on": 0, "admitted": 7, "share": 0.7, "new": 7, "mean_confidence": 0.8,
            "agreement": None, "audit_accuracy": 0.5, "audit_pool_accuracy": 0.4,
            "per_class": [3, 4], "size": 10}
    record = {"generation": 0, "heldout": 0.5, "epochs": [], "pool": pool}
    log = TensorBoardLog(tmp_path / "tb")
    log.generation(record, record, [record])
    log.close()
    found = EventAccumulator(str(tmp_path / "tb" / "gen0"))
    found.Reload()
    tags = found.Tags()["scalars"]
    assert found.Scalars("pool/admitted")[0].value == 7
    assert found.Scalars("pool/class/1")[0].value == 4
    assert "pool/agreement" not in tags  # None: generation 0 has no earlier pseudo-labels


# -- crashes and resume (the style of tests/test_faults.py: a real SIGKILL, the same command
# run again) --------------------------------------------------------------------------------

CRASH = {
    "data.labels": 40,
    "data.train_size": 140,
    "data.heldout_size": 60,
    "data.batch_size": 32,
    "training.epochs": 1,
    "generations.max_generations": 1,
    "generations.patience": 5,
    "run.seeds": "[0]",
    "pool.select": "top",
    "pool.count": 30,
    "pool.keep": "stay",
}
POOL_KILLS = {
    # the training pass has 2 batches of 32 over the 40 labels; the third is the pool's
    "teacher:gen1#3": "during generation 1's pass over the pool",
}


def _cli(run_dir, fault=None):
    import os
    import subprocess
    import sys

    env = {k: v for k, v in os.environ.items() if k != "FILIAL_FAULT"}
    if fault:
        env["FILIAL_FAULT"] = fault
    argv = [sys.executable, "-m", "filial", "run", str(ROOT / "recipes" / "digits_unlabeled.toml")]
    argv += ["--run-dir", str(run_dir)]
    for key, value in CRASH.items():
        argv += ["--set", f"{key}={value}"]
    return subprocess.run(argv, capture_output=True, text=True, env=env, timeout=300)


def _pool_records(run_dir):
    records = json.loads((run_dir / "seed0" / "lineage.json").read_text())["records"]
    return [{k: v for k, v in r.items() if k != "seconds"} for r in records]


@pytest.fixture(scope="module")
def pool_reference(tmp_path_factory):
    """An uninterrupted run of the same command, in this process (the same records: CPU)."""
    from filial import cli

    folder = tmp_path_factory.mktemp("pool_reference")
    argv = ["run", str(ROOT / "recipes" / "digits_unlabeled.toml"), "--run-dir"]
    argv += [str(folder / "run")]
    for key, value in CRASH.items():
        argv += ["--set", f"{key}={value}"]
    assert cli.main(argv) == 0
    return _pool_records(folder / "run")


@pytest.mark.slow
@pytest.mark.parametrize("fault", list(POOL_KILLS), ids=list(POOL_KILLS.values()))
def test_a_kill_in_the_pool_steps_resumes_as_if_nothing_happened(fault, pool_reference, tmp_path):
    import signal

    run_dir = tmp_path / "run"
    killed = _cli(run_dir, fault)
    assert killed.returncode == -signal.SIGKILL, killed.stderr
    assert [r["generation"] for r in _pool_records(run_dir)] == [0]
    rerun = _cli(run_dir)
    assert rerun.returncode == 0, rerun.stderr
    assert _pool_records(run_dir) == pool_reference  # the same pool figures, files and sha256s
    assert not list(run_dir.rglob(".*.tmp-*"))


@pytest.mark.skipif(not torch.cuda.is_available(), reason="needs a CUDA device")
def test_a_pool_lineage_with_the_model_on_the_gpu(loaders, tmp_path):
    """Nothing of the pool assumes the CPU: scores, one-hot rows and the loss follow the
    model's device (untested here: the machines these tests ran on had no GPU)."""
    device = torch.device("cuda")
    train, heldout, _ = loaders
    lineage = filial.Lineage(
        lambda: TinyNet()().to(device), train, heldout, run_dir=tmp_path / "gpu",
        max_generations=1, unlabeled_loader=_pool_loader(n=20), progress=False,
        admission=Admission(select="everything", pseudo="hard"), tensorboard=False,
    )
    for gen in lineage:
        model = gen.model
        opt = torch.optim.SGD(model.parameters(), lr=0.1)
        for inputs, labels, targets in gen.loader:
            loss = gen.loss(model(inputs.to(device)), labels, targets)
            assert loss.is_cuda
            opt.zero_grad()
            loss.backward()
            opt.step()
        gen.finish(model)
    assert [r["pool"]["admitted"] for r in lineage.result.records] == [20, 20]

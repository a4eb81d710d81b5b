"""Lineages under a process group: shards, the gather of indexed outputs, one shared decision.

The fast tests need no process group: the assembly of gathered rows, the padding of torch's
``DistributedSampler`` and the epochs the wrapped loader gives it. The slow ones start two gloo
ranks with ``torch.multiprocessing`` (spawn, file rendezvous in ``tmp_path``; the jobs are in
``tests/distributed_jobs.py``) and one run of ``recipes/torchrun_loop.py`` under ``torchrun``.

Outside references: ``torch.utils.data.DistributedSampler`` itself (its docs: without
``drop_last`` it pads the index list by repeating samples until it divides evenly, and
``set_epoch`` must be called before every epoch for the shuffling to change), scikit-learn's
``accuracy_score`` for the held-out figures, ``torch.testing.assert_close`` tolerances.
"""

from __future__ import annotations

import json
import os
import subprocess
import sys
from pathlib import Path

import numpy as np
import pytest
import torch
from conftest import TinyNet, blobs
from distributed_jobs import (
    AUGMENTED_FEATURES,
    BATCH,
    EPOCHS,
    HIDDEN,
    TRAIN_SIZE,
    Augmented,
    collectives_job,
    lineage_job,
    pool_job,
    run,
)
from sklearn.metrics import accuracy_score
from torch.utils.data import DataLoader, DistributedSampler

import filial
from filial import distributed, spectral
from filial.checkpoint import load_checkpoint
from filial.data import EpochLoader, Replay, sharded_loader, training_loader
from filial.demo import MLP, mail_room
from filial.distributed import CoverageError, assemble, padding_rows
from filial.evaluation import predict
from filial.seeding import derive_seed
from filial.store import TargetStore

ROOT = Path(__file__).resolve().parents[1]


def _shards(size: int, world: int) -> list[DistributedSampler]:
    return [
        DistributedSampler(range(size), num_replicas=world, rank=r, shuffle=False)
        for r in range(world)
    ]


# -- the assembly of gathered rows (no process group) -------------------------------------


@pytest.mark.parametrize(("size", "world"), [(7, 2), (8, 2), (10, 3), (1, 2), (5, 4)])
def test_padding_rows_are_the_samplers_repeats(size, world):
    """The positions padding_rows marks are exactly DistributedSampler's extra indices."""
    kept, repeated = [], []
    for sampler in _shards(size, world):
        order = torch.tensor(list(sampler))
        mask = padding_rows(sampler)
        assert len(mask) == len(order) == sampler.num_samples
        kept += order[~mask].tolist()
        repeated += order[mask].tolist()
    assert sorted(kept) == list(range(size))  # every sample once, without the repeats
    # torch pads by repeating the first indices of the list: total_size - size of them
    assert len(repeated) == world * -(-size // world) - size
    assert all(i < size for i in repeated)


@pytest.mark.parametrize(
    ("size", "world"), [(7, 2), (8, 2), (10, 3), (1, 2), (5, 4), (2, 5), (1001, 7)]
)
def test_the_pass_shards_are_distributed_samplers_without_its_list(size, world):
    """The passes' lazy shards give DistributedSampler's very order (its padding included),
    and padding_rows marks the same positions on both."""
    for rank in range(world):
        torchs = DistributedSampler(range(size), num_replicas=world, rank=rank, shuffle=False)
        lazy = distributed._InOrderShard(
            range(size), num_replicas=world, rank=rank, shuffle=False, drop_last=False
        )
        assert list(lazy) == list(torchs) and len(lazy) == len(torchs)
        positions = torch.arange(rank, torchs.total_size, world)
        assert torch.equal(padding_rows(lazy), positions >= size)
        assert padding_rows(lazy)[: distributed.padding_start(lazy)].logical_not().all()


def test_odd_dataset_with_padding_gives_each_index_once():
    size, world = 7, 2
    indices, outputs, labels = [], [], []
    for sampler in _shards(size, world):
        order = torch.tensor(list(sampler))
        marked = order.clone()
        marked[padding_rows(sampler)] = -1
        indices.append(marked)
        outputs.append(torch.stack([order * 10.0, -order.float()], dim=1))
        labels.append(order % 2 == 0)  # bool labels come back as bools
    assert sum(len(i) for i in indices) == 8  # one padding duplicate
    whole, flags = assemble(indices, [outputs, labels], size)
    expected = torch.arange(size)
    assert torch.equal(whole, torch.stack([expected * 10.0, -expected.float()], dim=1))
    assert torch.equal(flags, expected % 2 == 0)


def test_a_missing_index_is_named():
    order = [torch.tensor([0, 2, 4, 6]), torch.tensor([1, 3, 5])]  # 7 is missing
    values = [[torch.zeros(4, 2), torch.zeros(3, 2)]]
    with pytest.raises(CoverageError, match=r"1 of 8 sample indices are missing: 7"):
        assemble(order, values, 8)


def test_duplicates_and_indices_beyond_the_dataset_are_named():
    order = [torch.tensor([0, 1, 2]), torch.tensor([2, 3, 9])]
    values = [[torch.zeros(3), torch.zeros(3)]]
    with pytest.raises(CoverageError) as caught:
        assemble(order, values, 4)
    message = str(caught.value)
    assert "1 rows name indices beyond 3: 9" in message
    assert "1 sample indices arrived more than once" in message and ": 2" in message


def test_gather_in_one_process_is_the_assembly():
    assert not distributed.is_distributed()
    indices = torch.tensor([2, 0, 1, 0])
    padding = torch.tensor([False, False, False, True])
    (rows,) = distributed.gather_indexed(indices, 3, indices * 2.0, padding=padding)
    assert rows.tolist() == [0.0, 2.0, 4.0]
    with pytest.raises(CoverageError, match="more than once"):
        distributed.gather_indexed(indices, 3, indices * 2.0)


# -- epochs of a DistributedSampler (no process group) ------------------------------------


class _Noting(DistributedSampler):
    def __init__(self, *args, **kwargs):
        super().__init__(*args, **kwargs)
        self.epochs: list[int] = []

    def set_epoch(self, epoch):
        super().set_epoch(epoch)
        self.epochs.append(epoch)


def test_the_wrapped_loader_tells_the_sampler_each_epoch():
    """Epoch k of gen.loader's shard is DistributedSampler's order after set_epoch(k), and
    the two ranks' shards of each epoch are complementary."""
    data = blobs(10)
    samplers = [_Noting(data, num_replicas=2, rank=r, shuffle=True, seed=5) for r in range(2)]
    loaders = [training_loader(DataLoader(data, batch_size=2, sampler=s), None) for s in samplers]
    assert all(isinstance(loader, EpochLoader) for loader in loaders)
    seen = [[] for _ in loaders]
    for _epoch in range(3):
        for rank, loader in enumerate(loaders):
            order = []
            for inputs, _labels, targets in loader:
                assert targets is None
                # the rows tell their sample: inputs are unique per sample in blobs
                order += [int((data.tensors[0] == row).all(dim=1).nonzero()) for row in inputs]
            seen[rank].append(order)
    for sampler in samplers:
        assert sampler.epochs == [0, 1, 2]
    reference = _Noting(data, num_replicas=2, rank=0, shuffle=True, seed=5)
    for epoch in range(3):
        reference.set_epoch(epoch)  # what a plain distributed loop does by hand (torch docs)
        assert seen[0][epoch] == list(reference)
        assert sorted(seen[0][epoch] + seen[1][epoch]) == list(range(10))
    assert len({tuple(order) for order in seen[0]}) == 3  # every epoch its own order


def test_a_recipes_training_loader_is_sharded_for_torchrun():
    """filial run under torchrun: the recipe's loader gets a DistributedSampler (shuffled as the
    loader was) and each process a share of the batch; what cannot be sharded is named."""
    data = blobs(10)
    shuffled = DataLoader(data, batch_size=4, shuffle=True, num_workers=0, drop_last=True)
    shards = [sharded_loader(shuffled, 2, rank) for rank in range(2)]
    for rank, shard in enumerate(shards):
        sampler = shard.sampler
        assert isinstance(sampler, DistributedSampler) and sampler.shuffle
        assert (sampler.rank, sampler.num_replicas, shard.batch_size) == (rank, 2, 2)
        assert shard.drop_last and shard.collate_fn is shuffled.collate_fn
    assert sorted(list(shards[0].sampler) + list(shards[1].sampler)) == list(range(10))
    plain = sharded_loader(DataLoader(data, batch_size=4), 2, 0)
    assert not plain.sampler.shuffle
    assert sharded_loader(shards[0], 2, 0) is shards[0]  # sharded already
    with pytest.raises(TypeError, match=r"should be a multiple of 3, but got batch_size=4"):
        sharded_loader(shuffled, 3, 0)
    weighted = torch.utils.data.WeightedRandomSampler([1.0] * 10, 10)
    with pytest.raises(TypeError, match="Give the loader a torch.utils.data.DistributedSampler"):
        sharded_loader(DataLoader(data, batch_size=4, sampler=weighted), 2, 0)


def test_a_loader_without_set_epoch_is_rebuilt_as_before():
    loader = training_loader(DataLoader(blobs(10), batch_size=4, shuffle=True), None)
    assert type(loader) is DataLoader


def test_each_generation_gives_the_sampler_its_own_seed(tmp_path):
    """DistributedSampler shuffles by seed + epoch: the lineage derives the seed per generation
    (the same for every rank, and again on a rerun), and the epochs start at 0 each time."""

    def seeds(run_dir):
        data = blobs(24)
        sampler = _Noting(data, num_replicas=2, rank=1, shuffle=True, seed=0)
        lineage = filial.Lineage(
            TinyNet(),
            DataLoader(data, batch_size=4, sampler=sampler),
            DataLoader(blobs(12, seed=2), batch_size=6),
            run_dir=run_dir,
            max_generations=2,
            patience=5,
            seed=7,
            tensorboard=False,
            progress=False,
        )
        found = []
        for gen in lineage:
            sampler.epochs.clear()
            optimizer = torch.optim.SGD(gen.model.parameters(), lr=0.2)
            for _epoch in range(2):
                for inputs, labels, targets in gen.loader:
                    loss = gen.loss(gen.model(inputs), labels, targets)
                    optimizer.zero_grad()
                    loss.backward()
                    optimizer.step()
            found.append((sampler.seed, list(sampler.epochs)))
            gen.finish(gen.model)
        return found

    first = seeds(tmp_path / "a")
    assert [s for s, _ in first] == [derive_seed(7, g, 2) for g in range(3)]
    assert len({s for s, _ in first}) == 3
    assert all(epochs == [0, 1] for _, epochs in first)
    assert seeds(tmp_path / "b") == first


# -- two ranks ---------------------------------------------------------------------------


@pytest.mark.slow
def test_collectives_on_two_ranks(tmp_path):
    reports = run(collectives_job, tmp_path)
    zero, one = reports
    # DistributedSampler's shards of 7 samples: rank 0 gets 0, 2, 4, 6; rank 1 gets 1, 3, 5
    # and a repeat of sample 0 (its padding)
    assert zero["shard"] == [0, 2, 4, 6] and one["shard"] == [1, 3, 5, 0]
    assert zero["padding"] == [False] * 4 and one["padding"] == [False, False, False, True]
    expected = torch.arange(7)
    assert zero["gathered"] == [
        torch.stack([expected * 10.0, expected + 0.5], dim=1).tolist(),
        (expected % 3).tolist(),
    ]
    assert one["gathered"] is None
    assert zero["missing"].startswith("CoverageError") and "missing: 5" in zero["missing"]
    assert one["missing"].startswith("CoverageError") and "rank 0's error" in one["missing"]
    assert zero["uneven"] == one["uneven"]
    assert zero["uneven"].startswith("ValueError: rank(s) [1] passed tensors whose rows")
    assert "more than once" in zero["duplicate"] and ": 0" in zero["duplicate"]
    assert one["duplicate"].startswith("CoverageError")
    # the streamed pass's counts: the same rules, with rank 0 naming the indices
    assert zero["counts_whole"] is None and one["counts_whole"] is None
    assert "1 of 7 sample indices are missing: 5" in zero["counts_missing"]
    assert "more than once" in zero["counts_twice"] and ": 0" in zero["counts_twice"]
    assert "1 rows name indices beyond 6: 9" in zero["counts_beyond"]
    for name in ("counts_missing", "counts_twice", "counts_beyond"):
        assert one[name].startswith("CoverageError") and "rank 0's error" in one[name], name
    assert zero["rank_zero_failed"] == "OSError: disk full (simulated)"
    assert (
        one["rank_zero_failed"].startswith("RankZeroFailed")
        and "writing x" in one["rank_zero_failed"]
    )
    assert zero["broadcast"] == one["broadcast"] == [4, 2]
    assert zero["sums"] == one["sums"] == [3.0, 4.0]
    assert zero["running_mean"] == one["running_mean"] == [1.0, 1.0]  # rank 0's buffers
    for report in reports:
        assert "rank(s) [1] differ from rank 0's" in report["replicas_differ"]
        assert "DistributedDataParallel" in report["replicas_differ"]
        assert "rank(s) [1] built the Lineage with other settings" in report["settings_differ"]
        assert "DistributedDataParallel" in report["finish_unsynced"]
    assert any("no DistributedSampler" in w for w in zero["warnings"])
    assert one["warnings"] == []  # the other ranks print nothing
    # the refused generation wrote nothing; the refused settings made no run directory
    assert zero["plain_files"] == [".lock", "lineage.json"]
    assert not (tmp_path / "seeds").exists()
    # rank 0's failure inside finish reaches rank 1 as an error, not as a wait without end
    assert "the metric failed (simulated)" in zero["finish_failed"]
    assert one["finish_failed"].startswith("RankZeroFailed")
    assert "finishing generation 0" in one["finish_failed"]
    # fit_epochs' figures over both shards (one shard alone would give 1.0 or 0.0)
    assert zero["summed_accuracy"] == one["summed_accuracy"] == 0.5


@pytest.fixture(scope="module")
def two_ranks(tmp_path_factory):
    root = tmp_path_factory.mktemp("ranks")
    return root, run(lineage_job, root)


def _same(a, b) -> bool:
    return json.dumps(a, sort_keys=True) == json.dumps(b, sort_keys=True)


def _without_seconds(records):
    timings = ("seconds", "spectrum_seconds")
    return [{k: v for k, v in r.items() if k not in timings} for r in records]


@pytest.mark.slow
def test_both_ranks_report_the_same_records_and_stop_together(two_ranks):
    root, (zero, one) = two_ranks
    for name in ("straight", "resumed", "managed", "online"):
        assert _same(zero[name]["records"], one[name]["records"]), name
        state = json.loads((root / name / "lineage.json").read_text(encoding="utf-8"))
        assert _same(state["records"], zero[name]["records"]), name
    straight = zero["straight"]
    assert straight["stop_reason"] == one["straight"]["stop_reason"] is not None
    assert straight["best"] == one["straight"]["best"]
    assert len(straight["records"]) >= 2
    # only rank 0 writes TensorBoard runs: one event file per run
    assert len(list((root / "straight" / "tb" / "gen0").iterdir())) == 1
    # The spectral view: rank 0's kernel, and each generation's subset rows gathered from both
    # shards are the stored targets of those samples (one process's projection of them).
    assert "forecast" in straight["records"][0]
    folder = root / "straight" / spectral.FOLDER
    kernel = spectral.load_kernel(folder)
    assert len(kernel.indices) == 300
    for record in straight["records"]:
        g = record["generation"]
        stored = filial.TargetStore(root / "straight" / f"gen{g}").read_all()[:, 0, :]
        expected = kernel.coefficients(stored[kernel.indices].astype(np.float64))
        np.testing.assert_allclose(spectral.load_coefficients(folder, g), expected, atol=1e-9)
        figures = spectral.spectrum_figures(expected)
        assert record["spectrum"]["components95"] == figures["components95"]


def _as_one_process_writes_it(
    directory: Path, outputs: torch.Tensor, scratch: Path, views: int = 1
) -> bool:
    """The store in ``directory`` is byte for byte the in-memory writer's store of one
    process's ``outputs`` (its manifest included), written to ``scratch``."""
    manifest = json.loads((directory / "targets.json").read_text(encoding="utf-8"))
    alone = scratch / f"{directory.parent.name}-{directory.name}"
    TargetStore.write(
        alone,
        outputs.view(-1, views, outputs.shape[1]).numpy(),
        dtype=manifest["dtype"],
        fingerprint=manifest["fingerprint"],
        teacher_sha256=manifest["teacher_sha256"],
        top_k=manifest["top_k"],
    )
    names = ["targets.npy", "targets.json"] + (["targets_index.npy"] if manifest["top_k"] else [])
    return all((directory / n).read_bytes() == (alone / n).read_bytes() for n in names)


@pytest.mark.slow
def test_the_store_holds_one_target_per_sample_as_one_process_computes_it(two_ranks, tmp_path):
    """Rank 0's store equals a single-process teacher pass with the same checkpoint, byte for
    byte, and the recorded figures are those of the whole training and held-out sets."""
    root, (zero, _) = two_ranks
    room = mail_room(noise=0.3, seed=0, train_size=TRAIN_SIZE, heldout_size=299)
    for record in zero["straight"]["records"]:
        directory = root / "straight" / f"gen{record['generation']}"
        manifest = json.loads((directory / "targets.json").read_text(encoding="utf-8"))
        assert manifest["count"] == TRAIN_SIZE and manifest["shape"] == [TRAIN_SIZE, 1, 10]
        model = MLP(HIDDEN)()
        model.load_state_dict(load_checkpoint(root / "straight" / record["checkpoint"]))
        reference = predict(model, DataLoader(room.train, batch_size=BATCH), seed=0)
        targets = torch.from_numpy(np.load(directory / "targets.npy"))[:, 0]
        torch.testing.assert_close(targets, reference.outputs)  # float32 store
        assert _as_one_process_writes_it(directory, reference.outputs, tmp_path)
        heldout = torch.from_numpy(np.load(directory / "heldout.npy"))
        torch.testing.assert_close(heldout, predict(model, DataLoader(room.heldout), 0).outputs)
        # scikit-learn's accuracy over every held-out and training sample
        labels = room.heldout.tensors[1].numpy()
        assert record["heldout"] == pytest.approx(accuracy_score(labels, heldout.argmax(1)))
        noisy = room.train.tensors[1].numpy()
        assert record["train"] == pytest.approx(accuracy_score(noisy, targets.argmax(1)))


@pytest.mark.slow
def test_each_epoch_tells_the_sampler_its_epoch_and_shards_complement(two_ranks):
    _, (zero, one) = two_ranks
    generations = len(zero["straight"]["records"])
    calls = zero["straight"]["calls"]
    assert calls == one["straight"]["calls"]  # the same seed and epoch on both ranks
    assert len(calls) == generations * EPOCHS
    for g in range(generations):
        block = calls[g * EPOCHS : (g + 1) * EPOCHS]
        assert [epoch for _, epoch in block] == list(range(EPOCHS))
        assert {seed for seed, _ in block} == {derive_seed(3, g, 2)}
    for mine, theirs in zip(zero["straight"]["orders"], one["straight"]["orders"], strict=True):
        # 601 samples: 301 each, sample 0 repeated once as DistributedSampler's padding
        assert len(mine) == len(theirs) == 301
        assert set(mine) | set(theirs) == set(range(TRAIN_SIZE))
        assert len(set(mine) & set(theirs)) <= 1
    orders = zero["straight"]["orders"]
    assert orders[0] != orders[1]  # shuffling changes from epoch to epoch


@pytest.mark.slow
def test_a_resumed_two_rank_run_equals_one_that_went_straight_through(two_ranks):
    """Resumed after generation 0 with that generation's targets damaged: both ranks rebuild
    them together, and the run still equals the one that went straight through."""
    root, (zero, one) = two_ranks
    assert zero["resumed_from"] == one["resumed_from"] == 1
    assert _without_seconds(zero["resumed"]["records"]) == _without_seconds(
        zero["straight"]["records"]
    )
    assert zero["rebuilt_first_row"] == one["rebuilt_first_row"]
    straight = filial.TargetStore(root / "straight" / "gen0").read_all()[0, 0].tolist()
    assert zero["rebuilt_first_row"] == straight  # the damage is gone
    # rebuilt by the two ranks' streamed pass: the very bytes of the run that went straight
    for name in ("targets.npy", "targets.json"):
        rebuilt = (root / "resumed" / "gen0" / name).read_bytes()
        assert rebuilt == (root / "straight" / "gen0" / name).read_bytes(), name


@pytest.mark.slow
def test_a_compact_float16_store_is_one_process_s_byte_for_byte(two_ranks, tmp_path):
    root, (zero, one) = two_ranks
    assert _same(zero["compact"]["records"], one["compact"]["records"])
    room = mail_room(noise=0.3, seed=0, train_size=TRAIN_SIZE, heldout_size=299)
    for record in zero["compact"]["records"]:
        directory = root / "compact" / f"gen{record['generation']}"
        assert np.load(directory / "targets_index.npy").shape == (TRAIN_SIZE, 1, 4)
        model = MLP(HIDDEN)()
        model.load_state_dict(load_checkpoint(root / "compact" / record["checkpoint"]))
        reference = predict(model, DataLoader(room.train, batch_size=BATCH), seed=0)
        assert _as_one_process_writes_it(directory, reference.outputs, tmp_path)
    assert not list(root.rglob(".*.tmp-*"))  # no rank left a temporary behind


@pytest.mark.slow
def test_fit_epochs_trains_in_ddp_and_sums_the_epoch_figures(two_ranks):
    _, (zero, one) = two_ranks
    records = zero["managed"]["records"]
    assert all(len(r["epochs"]) == EPOCHS for r in records)
    # (that the figures are summed over both shards is checked in test_collectives_on_two_ranks)
    # the same DDP training as the hook loop: the same held-out figures
    hook = zero["straight"]["records"]
    assert [r["heldout"] for r in records][:2] == [r["heldout"] for r in hook][:2]


@pytest.mark.slow
def test_an_online_teacher_runs_on_every_rank(two_ranks):
    root, (zero, _) = two_ranks
    records = zero["online"]["records"]
    assert [r["mode"] for r in records][:2] == ["labels", "online"]
    assert not (root / "online" / "gen0" / "targets.npy").exists()  # nothing cached
    # generation 0 learns from the labels in both runs, with the same seeds and shards
    assert records[0]["heldout"] == zero["straight"]["records"][0]["heldout"]


@pytest.mark.slow
def test_replayed_views_are_shared_by_code_and_equal_one_process(two_ranks, tmp_path):
    """views=3 on an augmenting dataset: the ranks split the (sample, view) codes; the store
    holds one target per pair, equal to a single process's replayed pass with the checkpoint."""
    root, (zero, one) = two_ranks
    assert _same(zero["views"]["records"], one["views"]["records"])
    dataset = Augmented()
    replay = Replay(derive_seed(3, 3), 3)  # the lineage's replay for seed=3 (lineage._replay)
    for record in zero["views"]["records"]:
        directory = root / "views" / f"gen{record['generation']}"
        targets = torch.from_numpy(np.load(directory / "targets.npy"))
        assert targets.shape == (len(dataset), 3, 10)
        model = MLP(HIDDEN, inputs=AUGMENTED_FEATURES)()
        model.load_state_dict(load_checkpoint(root / "views" / record["checkpoint"]))
        alone = predict(model, DataLoader(dataset, batch_size=16), 0, replay=replay)
        torch.testing.assert_close(targets, alone.outputs.view(len(dataset), 3, 10))
        assert not torch.equal(targets[:, 0], targets[:, 1])  # the views differ
        assert _as_one_process_writes_it(directory, alone.outputs, tmp_path, views=3)


@pytest.mark.slow
def test_the_recipe_runs_under_torchrun(tmp_path):
    summary = tmp_path / "summary.json"
    command = [
        sys.executable,
        "-m",
        "torch.distributed.run",
        "--standalone",
        "--nproc-per-node=2",
        str(ROOT / "recipes" / "torchrun_loop.py"),
        "--epochs=2",
        "--generations=1",
        "--threads=1",
        f"--run-dir={tmp_path / 'run'}",
        f"--summary={summary}",
    ]
    env = {**os.environ, "OMP_NUM_THREADS": "1"}
    done = subprocess.run(command, capture_output=True, text=True, timeout=300, env=env)
    assert done.returncode == 0, done.stderr[-3000:]
    result = json.loads(summary.read_text(encoding="utf-8"))
    assert result["world_size"] == 2 and len(result["records"]) == 2
    assert np.load(tmp_path / "run" / "gen0" / "targets.npy").shape == (1000, 1, 10)
    assert done.stdout.count("held-out by generation") == 1  # rank 0 alone prints
    # the same file, launched plainly, runs in one process
    alone = [sys.executable, *command[5:-2], f"--run-dir={tmp_path / 'one'}", "--generations=0"]
    done = subprocess.run(alone, capture_output=True, text=True, timeout=300, env=env)
    assert done.returncode == 0, done.stderr[-3000:]
    assert "1 process(es)" in done.stdout


@pytest.mark.slow
def test_filial_run_under_torchrun_runs_seeds_and_the_matched_baseline(tmp_path):
    """``torchrun -m filial run``: two gloo ranks run a recipe's seeds and its matched
    baseline; rank 0 alone prints the report; every store is one process's byte for byte; the
    same command again resumes and trains nothing."""
    run_dir = tmp_path / "run"
    command = [
        sys.executable,
        "-m",
        "torch.distributed.run",
        "--standalone",
        "--nproc-per-node=2",
        "-m",
        "filial",
        "run",
        str(ROOT / "recipes" / "digits_ce.toml"),
        "--run-dir",
        str(run_dir),
        "--set",
        "run.seeds=[0, 1]",
        "--set",
        "model.hidden=[16]",
        "--set",
        "training.epochs=2",
        "--set",
        "generations.max=1",
    ]
    env = {**os.environ, "OMP_NUM_THREADS": "1"}
    done = subprocess.run(command, capture_output=True, text=True, timeout=600, env=env)
    assert done.returncode == 0, done.stderr[-3000:]
    assert done.stdout.count("2 lineage(s)") == 1  # one report, from rank 0
    assert done.stdout.count("matched baseline (") == 2
    room = mail_room(noise=0.3, seed=0)
    for seed in (0, 1):
        state = json.loads((run_dir / f"seed{seed}" / "lineage.json").read_text())
        assert [r["generation"] for r in state["records"]] == [0, 1]
        folder = run_dir / f"seed{seed}" / "baseline" / "matched"  # RUN/baseline/NAME/
        baseline = json.loads((folder / "baseline.json").read_text())
        assert baseline["epochs_matched"] == 4
        for record in state["records"]:
            directory = run_dir / f"seed{seed}" / f"gen{record['generation']}"
            model = MLP((16,))()
            model.load_state_dict(load_checkpoint(run_dir / f"seed{seed}" / record["checkpoint"]))
            reference = predict(model, DataLoader(room.train, batch_size=64), seed=0)
            assert _as_one_process_writes_it(directory, reference.outputs, tmp_path)
    checkpoints = {p: p.read_bytes() for p in run_dir.rglob("student.pt")}
    again = subprocess.run(command, capture_output=True, text=True, timeout=600, env=env)
    assert again.returncode == 0, again.stderr[-3000:]
    assert again.stderr.count("is already finished") == 2 and "generation 0:" not in again.stderr
    assert {p: p.read_bytes() for p in run_dir.rglob("student.pt")} == checkpoints
    assert not list(run_dir.rglob(".*.tmp-*"))


@pytest.mark.slow
def test_two_ranks_share_the_unlabelled_pool(tmp_path):
    """The pool under two gloo ranks: the same records on both, each student epoch split
    between them by DistributedSampler (ceil((labelled + admitted) / 2) rows a rank, its
    padding included), and the sharded pass over the pool equal to one process's."""
    from filial.lineage import load_generation
    from filial.pool import Admission, pool_data, pool_pass
    from filial.teacher import StoreSpec

    zero, one = run(pool_job, tmp_path)
    assert _same(zero["records"], one["records"])
    state = json.loads((tmp_path / "pool" / "lineage.json").read_text(encoding="utf-8"))
    assert _same(state["records"], zero["records"])
    records = zero["records"]
    for g, (a, b) in enumerate(zip(zero["rows"], one["rows"], strict=True)):
        admitted = 0 if g == 0 else records[g - 1]["pool"]["admitted"]
        assert a[0] == b[0] == -(-(TRAIN_SIZE + admitted) // 2)
        assert admitted <= a[1] + b[1] <= admitted + 1
    assert [r["pool"]["admitted"] for r in records] == [100 * (g + 1) for g in range(len(records))]
    # generation 0's checkpoint over the pool in one process: the same scores
    room = mail_room(noise=0.3, seed=0, train_size=TRAIN_SIZE, heldout_size=299)
    model = load_generation(MLP(HIDDEN), tmp_path / "pool", records[0])
    data = pool_data(DataLoader(room.test, batch_size=64), Admission(audit=True), None, 3)
    passed = pool_pass(model, data, 0, StoreSpec("float32", 1, None, "x"), tmp_path / "alone")
    assert passed is not None
    found = np.load(tmp_path / "pool" / "gen0" / "pool" / "scores.npy")
    np.testing.assert_allclose(found["confidence"], passed.scores.confidence, rtol=1e-5)
    assert np.array_equal(found["predicted"], passed.scores.predicted)
    passed.discard()

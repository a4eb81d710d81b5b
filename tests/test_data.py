"""The loader wrappers, end to end through hook mode, and the helpers in ``filial.data``.

The central property: in every student generation, each batch's ``targets`` are the teacher's
outputs on exactly that batch's inputs, whatever the user's loader does (shuffling, workers, a
custom collate function or batch sampler, ``drop_last``, ``__getitems__``, nested inputs, spawned
workers). Everything a worker process needs (datasets, collate functions, samplers,
``worker_init_fn``) is defined at module level so that it pickles under ``spawn``.
"""

from __future__ import annotations

import collections
import functools
import os
import pickle
import random
from pathlib import Path

import numpy as np
import pytest
import torch
from torch import nn
from torch.utils.data import (
    BatchSampler,
    DataLoader,
    Dataset,
    IterableDataset,
    RandomSampler,
    Sampler,
    SequentialSampler,
    TensorDataset,
    default_collate,
    get_worker_info,
)

import filial
from filial.checkpoint import load_checkpoint
from filial.data import (
    IndexedCollate,
    IndexedDataset,
    LoaderContractError,
    batch_size_of,
    check_loader,
    sequential_loader,
    split_pair,
    training_loader,
)
from filial.evaluation import move_to
from filial.probe import fingerprint, probe
from filial.seeding import derive_seed
from filial.store import TargetStore

FEATURES, CLASSES = 6, 3
FLOAT16 = {"atol": 1e-2, "rtol": 2e-3}  # half precision: ~3 significant digits
FLOAT32 = {"atol": 1e-5, "rtol": 1e-5}


# -- data, models and loader pieces (module level: they must pickle for spawned workers) --------


def _points(n: int, seed: int) -> tuple[torch.Tensor, torch.Tensor]:
    """Gaussian inputs labelled by a fixed random linear rule (learnable, roughly balanced)."""
    inputs = torch.randn(n, FEATURES, generator=torch.Generator().manual_seed(seed))
    rule = torch.randn(FEATURES, CLASSES, generator=torch.Generator().manual_seed(4321))
    return inputs, (inputs @ rule).argmax(dim=1)


def tensor_data(n: int = 96, seed: int = 0) -> TensorDataset:
    return TensorDataset(*_points(n, seed))


def make_linear() -> nn.Module:
    return nn.Linear(FEATURES, CLASSES)


def make_dropout_net() -> nn.Module:
    return nn.Sequential(
        nn.Linear(FEATURES, 16), nn.ReLU(), nn.Dropout(0.3), nn.Linear(16, CLASSES)
    )


class PairInputModel(nn.Module):
    """Takes a tuple/list of two tensors as its input."""

    def __init__(self) -> None:
        super().__init__()
        self.first = nn.Linear(FEATURES, CLASSES)
        self.second = nn.Linear(2, CLASSES)

    def forward(self, inputs):
        first, second = inputs
        return self.first(first) + self.second(second)


def make_pair_model() -> nn.Module:
    return PairInputModel()


class PairInputData(Dataset):
    """Samples ``((features, extra), label)``: the input is itself a tuple of two tensors."""

    def __init__(self, n: int, seed: int) -> None:
        self.inputs, self.labels = _points(n, seed)
        self.extra = torch.randn(n, 2, generator=torch.Generator().manual_seed(seed + 99))

    def __len__(self) -> int:
        return len(self.labels)

    def __getitem__(self, i):
        return (self.inputs[i], self.extra[i]), self.labels[i]


class BatchFetchData(Dataset):
    """A dataset with ``__getitems__`` (a batched fetch), counting how often it was used."""

    def __init__(self, n: int, seed: int) -> None:
        self.inputs, self.labels = _points(n, seed)
        self.batched_calls = 0

    def __len__(self) -> int:
        return len(self.labels)

    def __getitem__(self, i):
        return self.inputs[i], self.labels[i]

    def __getitems__(self, indices):
        self.batched_calls += 1
        return [(self.inputs[i], self.labels[i]) for i in indices]


class TripleOnBatchFetch(BatchFetchData):
    """Single samples are pairs, but the batched fetch returns (input, label, weight) triples."""

    def __getitems__(self, indices):
        return [(self.inputs[i], self.labels[i], torch.tensor(1.0)) for i in indices]


class AugmentedData(Dataset):
    """Random augmentation from all three global generators (torch, numpy, Python)."""

    def __init__(self, n: int, seed: int) -> None:
        self.inputs, self.labels = _points(n, seed)

    def __len__(self) -> int:
        return len(self.labels)

    def __getitem__(self, i):
        noise = (
            0.05 * torch.randn(FEATURES) + float(np.random.rand()) * 0.01 + random.random() * 0.01
        )
        return self.inputs[i] + noise, self.labels[i]


class WorkerConfigured(Dataset):
    """A dataset that its ``worker_init_fn`` configures through ``get_worker_info().dataset``."""

    shift = 0.0

    def __init__(self, n: int, seed: int) -> None:
        self.inputs, self.labels = _points(n, seed)

    def configure(self, shift: float) -> None:
        self.shift = shift

    def __len__(self) -> int:
        return len(self.labels)

    def __getitem__(self, i):
        return self.inputs[i] + self.shift, self.labels[i]


def configure_by_method(worker_id: int) -> None:
    get_worker_info().dataset.configure(100.0)


def configure_by_attribute(worker_id: int) -> None:
    get_worker_info().dataset.shift = 100.0


class Stream(IterableDataset):
    def __iter__(self):
        inputs, labels = _points(16, 0)
        return iter(zip(inputs, labels, strict=True))


def scale_collate(samples):
    """A user collate_fn: stacks, doubles the inputs, returns a list instead of a tuple."""
    inputs, labels = zip(*samples, strict=True)
    return [torch.stack(inputs) * 2.0, torch.stack(labels)]


class UnevenBatches(Sampler[list[int]]):
    """A custom batch sampler: a fixed permutation cut into batches of sizes 7, 13, 7, 13, ..."""

    def __init__(self, n: int, seed: int) -> None:
        self.order = torch.randperm(n, generator=torch.Generator().manual_seed(seed)).tolist()

    def __iter__(self):
        start, count = 0, 0
        while start < len(self.order):
            size = (7, 13)[count % 2]
            yield self.order[start : start + size]
            start, count = start + size, count + 1

    def __len__(self) -> int:
        return sum(1 for _ in iter(self))


def record_worker(worker_id: int, directory: str) -> None:
    """A worker_init_fn that leaves a mark per worker start."""
    Path(directory, f"worker-{os.getpid()}-{worker_id}").touch()


def heldout_loader(n: int = 48) -> DataLoader:
    return DataLoader(tensor_data(n, seed=1), batch_size=32)


def drive(lineage, generations, *, on_batch=None, epochs=1, lr=0.1):
    """The user's hook-mode loop for up to ``generations`` generations; returns the trained models.

    ``on_batch(gen, inputs, labels, targets, finished)`` sees every batch before the step, with
    ``finished`` the trained models of the earlier generations (``finished[gen.teacher]`` is the
    teacher).
    """
    finished: list[nn.Module] = []
    for gen in lineage:
        model = gen.model
        opt = torch.optim.SGD(model.parameters(), lr=lr)
        for epoch in range(epochs):
            total = 0.0
            for inputs, labels, targets in gen.loader:
                if on_batch is not None:
                    on_batch(gen, inputs, labels, targets, finished)
                loss = gen.loss(model(inputs), labels, targets)
                opt.zero_grad()
                loss.backward()
                opt.step()
                total += loss.item()
            gen.log_epoch(epoch, loss=total)
        gen.finish(model)
        finished.append(model)
        if len(finished) == generations:
            break
    assert len(finished) == generations, "the lineage stopped before the generations under test"
    return finished


def _rows(batch_inputs):
    return batch_inputs[0] if isinstance(batch_inputs, (list, tuple)) else batch_inputs


class TargetCheck:
    """Collects, per student batch, the cached targets and the teacher's outputs on its inputs."""

    def __init__(self) -> None:
        self.pairs: list[tuple[torch.Tensor, torch.Tensor]] = []
        self.sizes: dict[int, list[int]] = collections.defaultdict(list)

    def __call__(self, gen, inputs, labels, targets, finished) -> None:
        self.sizes[gen.index].append(len(labels))
        assert len(_rows(inputs)) == len(labels)
        if gen.index == 0:
            assert targets is None
            return
        assert gen.teacher == gen.index - 1
        teacher = finished[gen.teacher]
        with torch.no_grad():
            expected = teacher(inputs)
        assert targets.dtype == torch.float32 and targets.shape == expected.shape
        self.pairs.append((targets, expected))

    def assert_aligned(self, tolerance) -> None:
        assert self.pairs, "no student batch was seen"
        for targets, expected in self.pairs:
            torch.testing.assert_close(targets, expected, **tolerance)
        # The check can fail: the same targets against shifted rows do not match.
        mismatched = 0
        for targets, expected in self.pairs:
            if len(targets) > 1:
                shifted = torch.roll(expected, 1, dims=0)
                mismatched += not torch.allclose(targets, shifted, **tolerance)
        assert mismatched > 0


# -- 1. row alignment --------------------------------------------------------------------------


def _shuffled(n=96, **kw):
    return DataLoader(
        tensor_data(n),
        batch_size=16,
        shuffle=True,
        generator=torch.Generator().manual_seed(3),
        **kw,
    )


SCENARIOS = {
    "shuffle": lambda: (_shuffled(), make_linear),
    "collate_fn": lambda: (_shuffled(collate_fn=scale_collate), make_linear),
    "batch_sampler": lambda: (
        DataLoader(tensor_data(), batch_sampler=UnevenBatches(96, seed=5)),
        make_linear,
    ),
    "drop_last": lambda: (_shuffled(n=100, drop_last=True), make_linear),
    "getitems": lambda: (
        DataLoader(BatchFetchData(96, 0), batch_size=16, shuffle=True),
        make_linear,
    ),
    "nested_inputs": lambda: (
        DataLoader(PairInputData(96, 0), batch_size=16, shuffle=True),
        make_pair_model,
    ),
    "workers": lambda: (_shuffled(num_workers=2), make_linear),
}


def _heldout_for(train: DataLoader) -> DataLoader:
    if isinstance(train.dataset, PairInputData):
        return DataLoader(PairInputData(40, seed=1), batch_size=32)
    return heldout_loader()


@pytest.mark.parametrize(
    "scenario",
    [
        pytest.param(name, marks=pytest.mark.slow) if name == "workers" else name
        for name in SCENARIOS
    ],
)
@pytest.mark.parametrize("store_dtype", ["float16", "float32"])
def test_targets_are_the_teachers_outputs_on_each_batch(tmp_path, scenario, store_dtype):
    train, model_fn = SCENARIOS[scenario]()
    expected_sizes = [len(batch) for batch in train.batch_sampler]
    lineage = filial.Lineage(
        model_fn,
        train,
        _heldout_for(train),
        run_dir=tmp_path / "run",
        max_generations=1,
        store_dtype=store_dtype,
    )
    check = TargetCheck()
    drive(lineage, 2, on_batch=check)
    check.assert_aligned(FLOAT16 if store_dtype == "float16" else FLOAT32)
    # Batches keep the user's sizes (batch sampler, drop_last) in both generations.
    assert sorted(check.sizes[0]) == sorted(check.sizes[1]) == sorted(expected_sizes)
    if scenario == "drop_last":
        assert check.sizes[1] == [16] * 6  # 100 samples: the last 4 are dropped
    if scenario == "getitems":
        assert train.dataset.batched_calls > 0  # the user's batched fetch was used


def test_targets_follow_the_dataset_index(tmp_path):
    """training_loader gathers store row i for dataset sample i, under shuffling."""
    n = 50
    inputs = torch.arange(n, dtype=torch.float32)[:, None]
    dataset = TensorDataset(inputs, torch.zeros(n, dtype=torch.int64))
    rows = np.stack([np.arange(n), -2.0 * np.arange(n)], axis=1)[:, None, :]
    store = TargetStore.write(tmp_path, rows, dtype="float32", fingerprint="f", teacher_sha256="t")
    loader = DataLoader(dataset, batch_size=8, shuffle=True, drop_last=True)
    seen = []
    for x, _, targets in training_loader(loader, store):
        torch.testing.assert_close(targets, torch.cat([x, -2.0 * x], dim=1), rtol=0, atol=0)
        seen.extend(x[:, 0].long().tolist())
    assert sorted(seen) != seen and len(seen) == 48  # shuffled, last partial batch dropped


# -- 2. the user's settings are kept -----------------------------------------------------------


@pytest.mark.slow
@pytest.mark.filterwarnings("ignore:'pin_memory' argument is set as true")
def test_loader_keeps_worker_and_batching_settings(tmp_path):
    marks = tmp_path / "marks"
    marks.mkdir()
    init = functools.partial(record_worker, directory=str(marks))
    train = DataLoader(
        tensor_data(100),
        batch_size=16,
        shuffle=True,
        drop_last=True,
        generator=torch.Generator().manual_seed(3),
        num_workers=2,
        worker_init_fn=init,
        persistent_workers=True,
        pin_memory=True,
        timeout=30,
        prefetch_factor=3,
    )
    lineage = filial.Lineage(
        make_linear, train, heldout_loader(), run_dir=tmp_path / "run", max_generations=0
    )
    gen = next(iter(lineage))
    loader = gen.loader
    assert loader is gen.loader  # built once per generation, so persistent workers persist
    assert loader.num_workers == 2
    assert loader.worker_init_fn is init
    assert loader.persistent_workers is True
    assert loader.pin_memory is True
    assert loader.timeout == 30
    assert loader.prefetch_factor == 3
    assert loader.generator is train.generator
    assert len(loader) == len(train) == 6
    for _ in range(2):
        sizes = []
        for inputs, labels, targets in loader:
            assert targets is None and inputs.device.type == "cpu"
            sizes.append(len(labels))
        assert sizes == [16] * 6  # batch size and drop_last kept
    # worker_init_fn ran once in each of the two workers, which persisted across both epochs.
    assert len(list(marks.iterdir())) == 2


def test_shuffling_follows_the_users_generator_reseeded_per_generation(tmp_path):
    """gen.loader draws its order from the user's generator, exactly like the user's loader.

    What was found: at the start of every generation the lineage reseeds the user's loader
    generator (and its sampler's) with ``derive_seed(seed, index, 2)``, so the order is that of
    the user's loader with a generator seeded that way, not with the user's own seed; neither the
    construction nor ``gen.finish`` draws from it.
    """
    dataset = tensor_data(80)
    user = DataLoader(
        dataset, batch_size=16, shuffle=True, generator=torch.Generator().manual_seed(7)
    )
    twin_generator = torch.Generator()
    twin = DataLoader(dataset, batch_size=16, shuffle=True, generator=twin_generator)
    lineage = filial.Lineage(
        make_linear, user, heldout_loader(), run_dir=tmp_path / "run", max_generations=1, seed=11
    )
    seen = collections.defaultdict(list)

    def record(gen, inputs, labels, targets, finished):
        seen[gen.index].append((inputs, labels))

    drive(lineage, 2, on_batch=record, epochs=2)
    for index in (0, 1):
        twin_generator.manual_seed(derive_seed(11, index, 2))
        expected = [batch for _ in range(2) for batch in twin]
        assert len(seen[index]) == len(expected) == 10
        for (inputs, labels), (x, y) in zip(seen[index], expected, strict=True):
            assert torch.equal(inputs, x) and torch.equal(labels, y)
    first_epoch = torch.cat([labels for _, labels in seen[0][:5]])
    assert not torch.equal(first_epoch, dataset.tensors[1])  # it did shuffle


def _order_per_generation(lineage, stop_after=None):
    """Each generation's order of samples in one untrained pass over gen.loader."""
    orders = {}
    for gen in lineage:
        orders[gen.index] = torch.cat([inputs[:, 0] for inputs, _, _ in gen.loader])
        gen.finish(gen.model)
        if gen.index == stop_after:
            break
    return orders


def _sampler_loader(kind):
    dataset = tensor_data(48)
    generator = torch.Generator().manual_seed(21)
    if kind == "shuffle":
        return DataLoader(dataset, batch_size=8, shuffle=True, generator=generator)
    sampler = RandomSampler(dataset, generator=generator)
    return DataLoader(dataset, batch_sampler=BatchSampler(sampler, 8, drop_last=False))


@pytest.mark.parametrize(
    "kind",
    [
        "shuffle",
        "batch_sampler",
    ],
)
def test_resumed_run_shuffles_like_an_uninterrupted_one(tmp_path, kind):
    options = {"max_generations": 2, "patience": 5}

    def lineage(name):
        # Each call stands for a new process: a fresh loader, its generator seeded as at first.
        return filial.Lineage(
            make_linear, _sampler_loader(kind), heldout_loader(), run_dir=tmp_path / name, **options
        )

    whole = _order_per_generation(lineage("a"))
    _order_per_generation(lineage("b"), stop_after=0)
    resumed = _order_per_generation(lineage("b"))
    assert set(whole) == {0, 1, 2} and set(resumed) == {1, 2}
    assert not torch.equal(whole[1], whole[2])  # each generation has its own order
    for g in (1, 2):
        assert torch.equal(resumed[g], whole[g])


@pytest.mark.slow
@pytest.mark.parametrize(
    "init_fn",
    [
        pytest.param(configure_by_method, id="method"),
        pytest.param(configure_by_attribute, id="attribute"),
    ],
)
def test_worker_init_fn_configures_the_users_dataset(tmp_path, init_fn):
    def loader():
        return DataLoader(
            WorkerConfigured(32, 0), batch_size=8, num_workers=1, worker_init_fn=init_fn
        )

    # The user's own loader: every worker's dataset copy is configured (inputs shifted by 100).
    assert all(bool((x > 50).all()) for x, _ in loader())
    lineage = filial.Lineage(
        make_linear, loader(), heldout_loader(), run_dir=tmp_path / "run", max_generations=0
    )
    gen = next(iter(lineage))
    batches = list(gen.loader)
    assert len(batches) == 4
    assert all(bool((x > 50).all()) for x, _, _ in batches)


# -- 3. spawned workers ------------------------------------------------------------------------


@pytest.mark.slow
def test_spawned_workers_serve_generation_one(tmp_path):
    marks = tmp_path / "marks"
    marks.mkdir()
    train = DataLoader(
        tensor_data(64),
        batch_size=16,
        shuffle=True,
        generator=torch.Generator().manual_seed(0),
        collate_fn=scale_collate,
        num_workers=1,
        multiprocessing_context="spawn",
        worker_init_fn=functools.partial(record_worker, directory=str(marks)),
    )
    lineage = filial.Lineage(
        make_linear, train, heldout_loader(), run_dir=tmp_path / "run", max_generations=1
    )
    generations = iter(lineage)
    teacher = next(generations)
    teacher.finish(teacher.model)  # untrained is fine: its teacher pass runs in a spawned worker
    student = next(generations)
    assert student.index == 1
    check = TargetCheck()
    for inputs, labels, targets in student.loader:
        check(student, inputs, labels, targets, [teacher.model])
    check.assert_aligned(FLOAT16)
    assert sorted(check.sizes[1]) == [16] * 4
    assert len(list(marks.iterdir())) == 2  # one spawned worker for each of the two passes


# -- 4. contract errors ------------------------------------------------------------------------


def _refused(tmp_path, train, heldout=None, error=LoaderContractError, match=None):
    run = tmp_path / "run"
    with pytest.raises(error, match=match) as info:
        filial.Lineage(make_linear, train, heldout or heldout_loader(), run_dir=run)
    assert not run.exists()  # a refused construction writes nothing
    return str(info.value)


def test_iterable_dataset_is_refused_with_the_contract(tmp_path):
    message = _refused(tmp_path, DataLoader(Stream(), batch_size=8))
    assert issubclass(LoaderContractError, TypeError)
    assert "map-style" in message and "IterableDataset" in message


@pytest.mark.parametrize(
    "dataset, found",
    [
        (TensorDataset(*_points(20, 0), torch.ones(20)), "a list of 3 items"),
        (TensorDataset(_points(20, 0)[0]), "a list of 1 items"),
        (list(_points(20, 0)[0]), "a Tensor"),
    ],
    ids=["triples", "one-tuple", "bare-tensor"],
)
def test_batches_that_are_not_pairs_are_refused_at_construction(tmp_path, dataset, found):
    message = _refused(tmp_path, DataLoader(dataset, batch_size=4))
    assert "(inputs, labels)" in message and found in message


def test_batches_that_become_triples_are_refused_when_iterated(tmp_path):
    """Construction probes single samples; a batched fetch returning triples fails on use."""
    train = DataLoader(TripleOnBatchFetch(20, 0), batch_size=4)
    lineage = filial.Lineage(make_linear, train, heldout_loader(), run_dir=tmp_path / "run")
    gen = next(iter(lineage))
    with pytest.raises(LoaderContractError, match=r"\(inputs, labels\)") as info:
        next(iter(gen.loader))
    assert "a list of 3 items" in str(info.value)


def test_unbatched_loader_is_refused(tmp_path):
    message = _refused(tmp_path, DataLoader(tensor_data(20), batch_size=None))
    assert "batch_size=None" in message


def test_empty_dataset_is_refused(tmp_path):
    empty = TensorDataset(torch.empty(0, FEATURES), torch.empty(0, dtype=torch.int64))
    message = _refused(tmp_path, DataLoader(empty, batch_size=4))
    assert "empty" in message


def test_something_other_than_a_dataloader_is_refused(tmp_path):
    message = _refused(tmp_path, [(torch.zeros(2, FEATURES), torch.zeros(2, dtype=torch.int64))])
    assert "DataLoader" in message and "list" in message


def test_heldout_loader_must_not_be_the_training_loader(tmp_path):
    train = _shuffled()
    message = _refused(tmp_path, train, heldout=train, error=ValueError)
    assert "held-out" in message
    same_data = DataLoader(train.dataset, batch_size=8)
    _refused(tmp_path, train, heldout=same_data, error=ValueError, match="same dataset")


def test_several_loader_problems_are_reported_together(tmp_path):
    """Two broken loaders give one ValueError naming both (it is then no LoaderContractError)."""
    message = _refused(
        tmp_path,
        DataLoader(Stream(), batch_size=8),
        heldout=DataLoader(tensor_data(20), batch_size=None),
        error=ValueError,
    )
    assert "map-style" in message and "batch_size=None" in message


def test_refusal_leaves_an_existing_run_untouched(tmp_path):
    run = tmp_path / "run"
    train = _shuffled()
    drive(filial.Lineage(make_linear, train, heldout_loader(), run_dir=run, max_generations=0), 1)
    before = {p: p.read_bytes() for p in sorted(run.rglob("*")) if p.is_file()}
    assert run / "lineage.json" in before and run / "gen0" / "student.pt" in before
    for bad in (
        DataLoader(Stream(), batch_size=8),
        DataLoader(TensorDataset(*_points(20, 0), torch.ones(20)), batch_size=4),
    ):
        with pytest.raises(LoaderContractError):
            filial.Lineage(make_linear, bad, heldout_loader(), run_dir=run, max_generations=0)
    after = {p: p.read_bytes() for p in sorted(run.rglob("*")) if p.is_file()}
    assert after == before


# -- 5. the user's random state ----------------------------------------------------------------


def _global_states():
    return torch.get_rng_state(), random.getstate(), np.random.get_state()


def _assert_same_states(before, after):
    assert torch.equal(before[0], after[0]), "torch's global generator moved"
    assert before[1] == after[1], "Python's random module moved"
    assert before[2][0] == after[2][0] and np.array_equal(before[2][1], after[2][1])
    assert before[2][2:] == after[2][2:], "numpy's global generator moved"


def test_construction_draws_nothing_from_global_generators(tmp_path):
    train = DataLoader(AugmentedData(40, 0), batch_size=8, shuffle=True)
    torch.manual_seed(5)
    random.seed(5)
    np.random.seed(5)
    before = _global_states()
    filial.Lineage(make_linear, train, heldout_loader(), run_dir=tmp_path / "run")
    _assert_same_states(before, _global_states())


def test_each_generation_reseeds_the_global_generators(tmp_path):
    """The documented per-generation seeding: torch, numpy and Python from (seed, index)."""
    lineage = filial.Lineage(
        make_linear, _shuffled(), heldout_loader(), run_dir=tmp_path / "run", seed=4
    )
    gen = next(iter(lineage))
    assert torch.initial_seed() == derive_seed(4, 0)
    torch.manual_seed(derive_seed(4, 0))
    assert torch.equal(gen.model.weight, make_linear().weight)


@pytest.mark.parametrize(
    "dataset",
    [
        pytest.param(tensor_data(40), id="deterministic"),
        pytest.param(AugmentedData(40, 0), id="augmented"),
    ],
)
def test_finish_draws_nothing_from_global_generators(tmp_path, dataset):
    train = DataLoader(dataset, batch_size=8, shuffle=True)
    lineage = filial.Lineage(make_linear, train, heldout_loader(), run_dir=tmp_path / "run")
    gen = next(iter(lineage))
    torch.manual_seed(9)
    random.seed(9)
    np.random.seed(9)
    before = _global_states()
    gen.finish(gen.model)
    _assert_same_states(before, _global_states())


def test_identical_runs_are_identical(tmp_path):
    """Dropout and generator-less shuffling draw from the global generators, seeded per
    generation; two runs with one seed agree in every record and every saved byte."""
    runs = {}
    for name, noise in (("a", 1), ("b", 2)):
        torch.manual_seed(noise)  # whatever the state before, the lineage seeds its own
        train = DataLoader(tensor_data(80), batch_size=16, shuffle=True)
        lineage = filial.Lineage(
            make_dropout_net, train, heldout_loader(), run_dir=tmp_path / name, max_generations=1
        )
        drive(lineage, 2, epochs=2)
        runs[name] = lineage.result.records

    def stable(records):
        return [{k: v for k, v in r.items() if k != "seconds"} for r in records]

    assert stable(runs["a"]) == stable(runs["b"])
    assert all(len(r["epochs"]) == 2 for r in runs["a"])  # the losses are compared too
    for g in (0, 1):
        left = load_checkpoint(tmp_path / "a" / f"gen{g}" / "student.pt")
        right = load_checkpoint(tmp_path / "b" / f"gen{g}" / "student.pt")
        assert left.keys() == right.keys()
        assert all(torch.equal(left[k], right[k]) for k in left)
        for name in ("student.pt", "targets.npy", "heldout.npy"):
            a = (tmp_path / "a" / f"gen{g}" / name).read_bytes()
            assert a == (tmp_path / "b" / f"gen{g}" / name).read_bytes(), name
    a0 = load_checkpoint(tmp_path / "a" / "gen0" / "student.pt")
    a1 = load_checkpoint(tmp_path / "a" / "gen1" / "student.pt")
    assert not torch.equal(a0["0.weight"], a1["0.weight"])


# -- 6. devices --------------------------------------------------------------------------------

Pair = collections.namedtuple("Pair", "image mask")


def test_move_to_keeps_nested_structure():
    a, b, c, d = (torch.ones(2), torch.zeros(3), torch.arange(4), torch.eye(2))
    value = {"x": (a, [b, Pair(c, d)]), "n": 3, "s": "text", "none": None}
    moved = move_to(value, torch.device("meta"))
    assert set(moved) == {"x", "n", "s", "none"}
    assert type(moved["x"]) is tuple and type(moved["x"][1]) is list
    pair = moved["x"][1][1]
    assert type(pair) is Pair and pair.image.device.type == "meta"
    assert moved["x"][0].device.type == moved["x"][1][0].device.type == "meta"
    assert pair.mask.shape == d.shape and pair.image.dtype == c.dtype
    assert moved["n"] == 3 and moved["s"] == "text" and moved["none"] is None
    # Already on the device: the very same tensors come back.
    same = move_to(value, torch.device("cpu"))
    assert same["x"][0] is a and same["x"][1][1].mask is d


def test_loader_yields_cpu_tensors_and_loss_takes_them(tmp_path):
    lineage = filial.Lineage(
        make_linear, _shuffled(), heldout_loader(), run_dir=tmp_path / "run", max_generations=1
    )

    def on_cpu(gen, inputs, labels, targets, finished):
        assert inputs.device.type == labels.device.type == "cpu"
        if gen.index == 1:
            assert targets.device.type == "cpu"
            loss = gen.loss(gen.model(inputs), labels, targets)
            assert loss.ndim == 0 and torch.isfinite(loss)

    drive(lineage, 2, on_batch=on_cpu)


# -- the helpers in filial.data ----------------------------------------------------------------


def test_derive_seed_is_stable_and_spread():
    seeds = {derive_seed(0, g) for g in range(50)}
    assert len(seeds) == 50 and all(0 <= s < 2**31 for s in seeds)
    assert derive_seed(3, 1) == derive_seed(3, 1)
    assert derive_seed(0, 1) != derive_seed(1, 0) != derive_seed(0, 1, 2)


def test_split_pair_accepts_pairs_only():
    x, y = torch.zeros(2, 3), torch.zeros(2)
    assert split_pair((x, y)) == (x, y) and split_pair([x, y])[1] is y
    for batch, found in (((x, y, y), "a tuple of 3 items"), ({"x": x}, "a dict"), (x, "a Tensor")):
        with pytest.raises(LoaderContractError, match=r"\(inputs, labels\)") as info:
            split_pair(batch)
        assert found in str(info.value)


def test_check_loader_returns_a_good_loader():
    loader = DataLoader(tensor_data(10), batch_size=4)
    assert check_loader(loader, "train_loader") is loader
    with pytest.raises(LoaderContractError, match="heldout_loader"):
        check_loader(DataLoader(Stream(), batch_size=4), "heldout_loader")


def test_batch_size_of():
    dataset = tensor_data(20)
    assert batch_size_of(DataLoader(dataset, batch_size=16)) == 16
    sampler = BatchSampler(SequentialSampler(dataset), 5, drop_last=False)
    assert batch_size_of(DataLoader(dataset, batch_sampler=sampler)) == 5
    custom = DataLoader(dataset, batch_sampler=UnevenBatches(20, 0))
    assert batch_size_of(custom) == 256 and batch_size_of(custom, default=8) == 8


def test_sequential_loader_covers_every_sample_in_order():
    dataset = tensor_data(50)
    user = DataLoader(
        dataset, batch_size=16, shuffle=True, drop_last=True, collate_fn=scale_collate
    )
    before = torch.get_rng_state()
    batches = list(sequential_loader(user, seed=3))
    assert torch.equal(before, torch.get_rng_state())  # its private generator, not the global one
    indices = [i for batch, _, _ in batches for i in batch]
    assert indices == list(range(50)) and all(isinstance(i, int) for i in indices)
    assert [len(i) for i, _, _ in batches] == [16, 16, 16, 2]
    inputs = torch.cat([x for _, x, _ in batches])
    assert torch.equal(inputs, dataset.tensors[0] * 2.0)  # the user's collate_fn was used
    assert torch.equal(torch.cat([y for _, _, y in batches]), dataset.tensors[1])


def test_training_loader_without_store_yields_no_targets():
    user = DataLoader(BatchFetchData(30, 0), batch_size=8)
    batches = list(training_loader(user, None))
    assert [len(y) for _, y, _ in batches] == [8, 8, 8, 6]
    assert all(t is None for _, _, t in batches)
    assert torch.equal(torch.cat([x for x, _, _ in batches]), user.dataset.inputs)


def test_wrappers_pickle_without_an_open_memory_map(tmp_path):
    rows = np.random.default_rng(0).normal(size=(10, 1, 3)).astype(np.float32)
    store = TargetStore.write(tmp_path, rows, dtype="float32", fingerprint="f", teacher_sha256="t")
    store.gather(np.array([0]))  # opens the memory map in this process
    collate = pickle.loads(pickle.dumps(IndexedCollate(scale_collate, store)))
    assert collate.store._array is None and collate.collate_fn is scale_collate
    dataset = pickle.loads(pickle.dumps(IndexedDataset(tensor_data(10))))
    fetched = dataset.__getitems__([4, 1])
    x, y, targets = collate(fetched)
    assert torch.equal(x, tensor_data(10).tensors[0][[4, 1]] * 2.0)
    np.testing.assert_array_equal(targets.numpy(), rows[[4, 1], 0])


def test_indexed_collate_refuses_unbatched_samples():
    with pytest.raises(LoaderContractError, match="automatic batching"):
        IndexedCollate(default_collate)((torch.zeros(3), torch.tensor(0)))


def test_fingerprint_follows_the_labels_and_leaves_the_rng_alone():
    base = DataLoader(AugmentedData(40, 0), batch_size=8)
    before = _global_states()
    first = fingerprint(base)
    _assert_same_states(before, _global_states())
    assert fingerprint(base) == first  # augmentation noise in the inputs does not matter
    changed = AugmentedData(40, 0)
    changed.labels = changed.labels.clone()
    changed.labels[7] = (changed.labels[7] + 1) % CLASSES
    assert fingerprint(DataLoader(changed, batch_size=8)) != first
    assert fingerprint(DataLoader(AugmentedData(41, 0), batch_size=8)) != first


@pytest.mark.slow
def test_a_loader_that_yields_out_of_order_is_still_evaluated_in_order(tmp_path):
    """in_order=False lets workers hand batches back as they finish; the passes must not care."""
    train = DataLoader(tensor_data(64), batch_size=8, shuffle=True, num_workers=2, in_order=False)
    lineage = filial.Lineage(
        make_linear,
        train,
        heldout_loader(),
        run_dir=tmp_path / "run",
        max_generations=1,
        store_dtype="float32",
    )
    check = TargetCheck()
    drive(lineage, 2, on_batch=check)
    check.assert_aligned({"atol": 1e-5, "rtol": 1e-5})
    assert [r["generation"] for r in lineage.result.records] == [0, 1]


def test_probe_fingerprints_inputs_when_they_repeat():
    """Same labels, other inputs: a different fingerprint (deterministic data); augmentation
    that draws from the global generators is made repeatable by the probe's seeding."""
    base = tensor_data(40)
    inputs, labels = base.tensors
    first = probe(DataLoader(base, batch_size=8))
    assert first.deterministic
    moved = probe(DataLoader(TensorDataset(inputs * 100, labels), batch_size=8))
    assert moved.fingerprint != first.fingerprint
    augmented = probe(DataLoader(AugmentedData(40, 0), batch_size=8))
    assert augmented.deterministic
    assert (
        augmented.fingerprint == probe(DataLoader(AugmentedData(40, 0), batch_size=8)).fingerprint
    )

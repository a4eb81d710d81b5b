"""Jobs that tests/test_distributed.py runs on two ranks with torch.multiprocessing (spawn).

Each job joins a gloo process group through a file rendezvous in the test's tmp folder, does its
work and writes what it saw to ``OUT/rank{r}.json``, which the test process reads and checks.
They live in a module of their own because spawned processes import the function they run.
"""

from __future__ import annotations

import json
import logging
import os
import random
from pathlib import Path
from typing import Any

import numpy as np
import torch
import torch.distributed as dist
from torch import nn
from torch.nn.parallel import DistributedDataParallel
from torch.utils.data import DataLoader, Dataset, DistributedSampler, TensorDataset

import filial
from filial import distributed
from filial.demo import MLP, mail_room

# The recipe of the two-rank digits runs (also used single-process by the test for references).
TRAIN_SIZE, HELDOUT_SIZE = 601, 299  # odd sizes: the evaluation shards need padding
EPOCHS = 4
BATCH = 32  # per rank
GENERATIONS = 2  # max_generations: at most 3 generations
HIDDEN = (64,)


def start(rank: int, world: int, rendezvous: str) -> None:
    torch.set_num_threads(1)  # two ranks share the machine's cores
    os.environ.setdefault("OMP_NUM_THREADS", "1")
    dist.init_process_group("gloo", init_method=rendezvous, rank=rank, world_size=world)


def write(out: Path, rank: int, data: dict[str, Any]) -> None:
    (out / f"rank{rank}.json").write_text(json.dumps(data), encoding="utf-8")


class EpochLog(DistributedSampler):
    """A DistributedSampler that notes the seed and epoch it is given before every pass."""

    def __init__(self, *args: Any, **kwargs: Any) -> None:
        super().__init__(*args, **kwargs)
        self.calls: list[list[int]] = []
        self.orders: list[list[int]] = []

    def set_epoch(self, epoch: int) -> None:
        super().set_epoch(epoch)
        self.calls.append([int(self.seed), int(epoch)])

    def __iter__(self):
        order = list(super().__iter__())
        self.orders.append(order)
        return iter(order)


def digits(rank: int, world: int) -> tuple[DataLoader, DataLoader, DataLoader, EpochLog]:
    room = mail_room(noise=0.3, seed=0, train_size=TRAIN_SIZE, heldout_size=HELDOUT_SIZE)
    sampler = EpochLog(room.train, num_replicas=world, rank=rank, seed=0)
    train = DataLoader(room.train, batch_size=BATCH, sampler=sampler)
    return (
        train,
        DataLoader(room.heldout, batch_size=128),
        DataLoader(room.test, batch_size=256),
        sampler,
    )


def lineage(run_dir: Path, train, heldout, test, **settings: Any) -> filial.Lineage:
    # The spectral view on a subset of half the training set: its rows come from both shards.
    settings = {"store_dtype": "float32", "spectrum_samples": 300, **settings}
    return filial.Lineage(
        MLP(HIDDEN),
        train,
        heldout,
        run_dir=run_dir,
        targets="ce",
        max_generations=GENERATIONS,
        patience=1,
        test_loader=test,
        seed=3,
        **settings,
    )


def hook_loop(lin: filial.Lineage, stop_after: int | None = None) -> None:
    """The README's hook-mode loop under a process group (DistributedDataParallel)."""
    for gen in lin:
        model = DistributedDataParallel(gen.model)
        optimizer = torch.optim.SGD(model.parameters(), lr=0.1, momentum=0.9)
        for _epoch in range(EPOCHS):
            for inputs, labels, targets in gen.loader:
                loss = gen.loss(model(inputs), labels, targets)
                optimizer.zero_grad()
                loss.backward()
                optimizer.step()
        gen.finish(model)
        if stop_after is not None and gen.index == stop_after:
            break


def lineage_job(rank: int, world: int, rendezvous: str, root: str) -> None:
    """Hook mode straight through; hook mode interrupted after generation 0 and resumed by a
    new Lineage; managed mode (fit_epochs); hook mode with the teacher run online. Each rank
    reports its records and its sampler's calls."""
    start(rank, world, rendezvous)
    root_path = Path(root)
    report: dict[str, Any] = {}

    train, heldout, test, sampler = digits(rank, world)
    straight = lineage(root_path / "straight", train, heldout, test)
    hook_loop(straight)
    result = straight.result
    report["straight"] = {
        "records": result.records,
        "best": result.best,
        "stop_reason": result.stop_reason,
        "calls": sampler.calls,
        "orders": sampler.orders,
    }
    straight.close()

    train, heldout, test, _ = digits(rank, world)
    first = lineage(root_path / "resumed", train, heldout, test)
    hook_loop(first, stop_after=0)
    first.close()
    dist.barrier()
    if rank == 0:  # damage generation 0's targets: the resumed run rebuilds them on both ranks
        damaged = root_path / "resumed" / "gen0" / "targets.npy"
        array = np.load(damaged)
        array[0, 0, 0] += 1
        np.save(damaged, array)
    dist.barrier()
    second = lineage(root_path / "resumed", train, heldout, test)
    report["resumed_from"] = len(second.result.records)
    hook_loop(second)
    report["resumed"] = {"records": second.result.records, "stop_reason": second.result.stop_reason}
    second.close()
    rebuilt = filial.TargetStore(root_path / "resumed" / "gen0")
    rebuilt.verify()
    report["rebuilt_first_row"] = rebuilt.read_all()[0, 0].tolist()

    train, heldout, test, _ = digits(rank, world)
    managed = lineage(root_path / "managed", train, heldout, test)
    fit = filial.fit_epochs(EPOCHS, lambda p: torch.optim.SGD(p, lr=0.1, momentum=0.9))
    report["managed"] = {"records": managed.run(fit).records}
    managed.close()

    train, heldout, test, _ = digits(rank, world)
    online = lineage(root_path / "online", train, heldout, test, teacher_mode="online")
    hook_loop(online)
    report["online"] = {"records": online.result.records}
    online.close()

    # A compact store: float16, the 4 largest outputs of each sample.
    train, heldout, test, _ = digits(rank, world)
    compact = lineage(root_path / "compact", train, heldout, test, top_k=4, store_dtype="float16")
    hook_loop(compact)
    report["compact"] = {"records": compact.result.records}
    compact.close()

    # Replayed views of an augmenting dataset: the ranks share the (sample, view) codes.
    augmented = Augmented()
    sampler = DistributedSampler(augmented, num_replicas=world, rank=rank, seed=0)
    views = filial.Lineage(
        MLP(HIDDEN, inputs=AUGMENTED_FEATURES),
        DataLoader(augmented, batch_size=16, sampler=sampler),
        DataLoader(Augmented(40, seed=2, noise=0.0), batch_size=16),
        run_dir=root_path / "views",
        views=3,
        store_dtype="float32",
        max_generations=1,
        patience=3,
        seed=3,
        progress=False,
    )
    hook_loop(views)
    report["views"] = {"records": views.result.records}
    views.close()
    write(Path(root) / "out", rank, report)
    dist.destroy_process_group()


AUGMENTED_FEATURES = 64


class Augmented(Dataset):
    """Digits-sized Gaussian blobs whose samples draw noise from torch's global generator and a
    sign flip from Python's (a dataset with random augmentation)."""

    def __init__(self, n: int = 90, seed: int = 1, noise: float = 0.3) -> None:
        g = torch.Generator().manual_seed(seed)
        centres = torch.randn(10, AUGMENTED_FEATURES, generator=torch.Generator().manual_seed(9))
        self.labels = torch.randint(0, 10, (n,), generator=g)
        self.inputs = centres[self.labels] + torch.randn(n, AUGMENTED_FEATURES, generator=g)
        self.noise = noise

    def __len__(self) -> int:
        return len(self.labels)

    def __getitem__(self, index: int):
        x = self.inputs[index]
        if self.noise:
            x = x + self.noise * torch.randn(x.shape)
            x = -x if random.random() < 0.5 else x
        return x, self.labels[index]


class _Capture(logging.Handler):
    def __init__(self) -> None:
        super().__init__(logging.WARNING)
        self.messages: list[str] = []

    def emit(self, record: logging.LogRecord) -> None:
        self.messages.append(record.getMessage())


def _error(work) -> str | None:
    try:
        work()
    except Exception as exc:  # the test checks type and message
        return f"{type(exc).__name__}: {exc}"
    return None


class FailsOnRankZero:
    """A metric that raises on rank 0 only (as a user's metric or a full disk might)."""

    def __call__(self, outputs: torch.Tensor, labels: torch.Tensor) -> float:
        if dist.get_rank() == 0:
            raise RuntimeError("the metric failed (simulated)")
        return 0.0


def says_zero() -> nn.Module:
    """A model that predicts class 0 for every input (zero weights, bias towards class 0)."""
    model = nn.Linear(3, 2)
    with torch.no_grad():
        model.weight.zero_()
        model.bias.copy_(torch.tensor([1.0, 0.0]))
    return model


def collectives_job(rank: int, world: int, rendezvous: str, root: str) -> None:
    """The gather, the broadcasts and the checks of replicas and settings, on two ranks."""
    start(rank, world, rendezvous)
    report: dict[str, Any] = {}
    size = 7  # odd: DistributedSampler pads one rank's shard with a repeat of sample 0
    sampler = distributed.shard_sampler(list(range(size)))
    indices = torch.tensor(list(sampler))
    padding = distributed.padding_rows(sampler)
    outputs = torch.stack([indices * 10.0, indices + 0.5], dim=1)
    labels = indices % 3
    report["shard"] = indices.tolist()
    report["padding"] = padding.tolist()
    whole = distributed.gather_indexed(indices, size, outputs, labels, padding=padding)
    report["gathered"] = None if whole is None else [whole[0].tolist(), whole[1].tolist()]

    # A rank that loses one of its rows: every rank raises, rank 0 names the index.
    keep = torch.tensor([True, True, False, True]) if rank == 1 else torch.ones(4, dtype=bool)
    report["missing"] = _error(
        lambda: distributed.gather_indexed(
            indices[keep], size, outputs[keep], padding=padding[keep]
        )
    )
    # Rank 1's rows do not fit its indices: refused on both ranks before any row is sent.
    short = outputs[:-1] if rank == 1 else outputs
    report["uneven"] = _error(
        lambda: distributed.gather_indexed(indices, size, short, padding=padding)
    )
    # The padding row sent as if it were a sample of its own: a duplicate, refused.
    report["duplicate"] = _error(lambda: distributed.gather_indexed(indices, size, outputs))

    # The streamed pass's check: one byte per index on each rank, summed on rank 0.
    def counts(kept: list[int]) -> np.ndarray:
        found = np.zeros(size, dtype=np.uint8)
        found[kept] = 1
        return found

    mine = indices[~padding].tolist()
    report["counts_whole"] = _error(lambda: distributed.check_counts(counts(mine), (0, [])))
    short = mine[:-1] if rank == 1 else mine  # rank 1 loses sample 5
    report["counts_missing"] = _error(lambda: distributed.check_counts(counts(short), (0, [])))
    twice = mine + [0] if rank == 1 else mine  # rank 1 keeps its padding row (sample 0)
    report["counts_twice"] = _error(lambda: distributed.check_counts(counts(twice), (0, [])))
    beyond = (1, [9]) if rank == 1 else (0, [])
    report["counts_beyond"] = _error(lambda: distributed.check_counts(counts(mine), beyond))

    def fail() -> None:
        raise OSError("disk full (simulated)")

    report["rank_zero_failed"] = _error(lambda: distributed.on_rank_zero(fail, "writing x"))
    report["broadcast"] = distributed.broadcast_ints([4, 2] if rank == 0 else None, 2)
    report["sums"] = distributed.all_sum([float(rank + 1), torch.tensor(2.0)])

    # Replicas: equal parameters pass and take rank 0's buffers; unequal ones are refused.
    torch.manual_seed(0)
    model = nn.Sequential(nn.Linear(3, 2), nn.BatchNorm1d(2))
    model[1].running_mean.fill_(float(rank + 1))
    distributed.align_replicas(model)
    report["running_mean"] = model[1].running_mean.tolist()
    with torch.no_grad():
        model[0].weight.add_(float(rank))
    report["replicas_differ"] = _error(lambda: distributed.align_replicas(model))

    # A Lineage built with other settings on one rank (a seed per rank) is refused on all.
    g = torch.Generator().manual_seed(0)
    data = TensorDataset(torch.randn(40, 3, generator=g), torch.randint(0, 2, (40,), generator=g))
    held = TensorDataset(torch.randn(20, 3, generator=g), torch.randint(0, 2, (20,), generator=g))

    def build(run_dir: Path, seed: int, loader: DataLoader) -> filial.Lineage:
        return filial.Lineage(
            lambda: nn.Linear(3, 2),
            loader,
            DataLoader(held, batch_size=8),
            run_dir=run_dir,
            seed=seed,
            tensorboard=False,
            progress=False,
        )

    sharded = DataLoader(data, batch_size=8, sampler=DistributedSampler(data))
    report["settings_differ"] = _error(lambda: build(Path(root) / "seeds", rank, sharded))

    # Without a DistributedSampler: rank 0 warns; the ranks' unsynchronised models are refused.
    capture = _Capture()
    logging.getLogger("filial").addHandler(capture)
    plain = DataLoader(data, batch_size=8, shuffle=True, generator=torch.Generator())
    unsharded = build(Path(root) / "plain", 0, plain)
    report["warnings"] = capture.messages
    gen = next(iter(unsharded))
    with torch.no_grad():
        gen.model.weight.add_(float(rank))  # as if each rank had trained on its own
    report["finish_unsynced"] = _error(lambda: gen.finish(gen.model))
    report["plain_files"] = sorted(p.name for p in (Path(root) / "plain").iterdir())
    unsharded.close()

    # Rank 0 fails while finishing (after the gathers): the other ranks are told, not left
    # waiting for a decision.
    failing = filial.Lineage(
        lambda: nn.Linear(3, 2),
        sharded,
        DataLoader(held, batch_size=8),
        run_dir=Path(root) / "failing",
        metric=FailsOnRankZero(),
        tensorboard=False,
        progress=False,
    )
    gen = next(iter(failing))
    report["finish_failed"] = _error(lambda: gen.finish(gen.model))
    failing.close()

    # fit_epochs sums its epoch figures over the ranks. Unshuffled shards that differ on
    # purpose: rank 0 holds the even samples (label 0), rank 1 the odd ones (label 1), and the
    # model says 0 everywhere (lr 0): 0.5 over both shards, 1.0 or 0.0 for one alone.
    halves = TensorDataset(torch.zeros(16, 3), torch.tensor([0, 1] * 8))
    split = DataLoader(halves, batch_size=4, sampler=DistributedSampler(halves, shuffle=False))
    summed = filial.Lineage(
        says_zero,
        split,
        DataLoader(held, batch_size=8),
        run_dir=Path(root) / "summed",
        tensorboard=False,
        progress=False,
    )
    gen = next(iter(summed))
    filial.fit_epochs(1, lambda params: torch.optim.SGD(params, lr=0.0), progress=False)(gen)
    report["summed_accuracy"] = gen.history[0]["running_accuracy"]
    summed.close()
    write(Path(root) / "out", rank, report)
    dist.destroy_process_group()


def pool_job(rank: int, world: int, rendezvous: str, root: str) -> None:
    """A lineage with an unlabelled pool (the mail room's test split as the pool, its labels
    for the audit only), hook mode under DDP; each rank reports its records and the rows (all,
    pool) of its shard in the first epoch of every generation."""
    start(rank, world, rendezvous)
    train, heldout, _, _ = digits(rank, world)
    room = mail_room(noise=0.3, seed=0, train_size=TRAIN_SIZE, heldout_size=HELDOUT_SIZE)
    rule = filial.Admission(select="top", count=100, keep="stay", audit=True)
    lin = lineage(
        Path(root) / "pool",
        train,
        heldout,
        None,
        unlabeled_loader=DataLoader(room.test, batch_size=64),
        admission=rule,
    )
    rows = []
    for gen in lin:
        model = DistributedDataParallel(gen.model)
        optimizer = torch.optim.SGD(model.parameters(), lr=0.1, momentum=0.9)
        for epoch in range(2):
            seen = [0, 0]
            for inputs, labels, targets in gen.loader:
                loss = gen.loss(model(inputs), labels, targets)
                optimizer.zero_grad()
                loss.backward()
                optimizer.step()
                seen = [seen[0] + len(labels), seen[1] + int((labels == -1).sum())]
            if epoch == 0:
                rows.append(seen)
        gen.finish(model)
    write(Path(root) / "out", rank, {"records": lin.result.records, "rows": rows})
    lin.close()
    dist.destroy_process_group()


def run(job, root: Path, world: int = 2) -> list[dict[str, Any]]:
    """Run ``job`` on ``world`` spawned ranks; the ranks' reports, in rank order."""
    (root / "out").mkdir(parents=True, exist_ok=True)
    rendezvous = f"file://{root / 'rendezvous'}"
    torch.multiprocessing.spawn(job, args=(world, rendezvous, str(root)), nprocs=world)
    return [
        json.loads((root / "out" / f"rank{r}.json").read_text(encoding="utf-8"))
        for r in range(world)
    ]

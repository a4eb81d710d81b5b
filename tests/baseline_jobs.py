"""The two-rank job of tests/test_baselines.py (spawned processes import the function they run).

A small digits lineage in managed mode (fit_epochs wraps the student in DDP), then its
early-stopped and matched baselines, on two gloo ranks with DistributedSamplers. Each rank
reports both records.
"""

from __future__ import annotations

from pathlib import Path

import torch
from distributed_jobs import start, write
from torch.utils.data import DataLoader, DistributedSampler

import filial
from filial import distributed
from filial.demo import MLP, mail_room


def baseline_job(rank: int, world: int, rendezvous: str, root: str) -> None:
    start(rank, world, rendezvous)
    room = mail_room(noise=0.3, seed=0, train_size=301, heldout_size=151)  # uneven shards
    sampler = DistributedSampler(room.train, num_replicas=world, rank=rank, seed=0)
    lineage = filial.Lineage(
        MLP((16,)),
        DataLoader(room.train, batch_size=32, sampler=sampler),
        DataLoader(room.heldout, batch_size=64),
        run_dir=Path(root) / "run",
        max_generations=1,
        patience=3,
        seed=2,
        progress=False,
        tensorboard=False,
    )

    def make_fit(epochs: int) -> filial.fit.EpochFit:
        return filial.fit_epochs(
            epochs, lambda p: torch.optim.SGD(p, lr=0.2, momentum=0.9), progress=False
        )

    lineage.run(make_fit(3))
    # finish checks that every rank holds rank 0's parameters (align_replicas), so the ranks
    # must have kept the same epoch's weights for this to return at all
    found = lineage.baselines(["early-stopping", "matched"], make_fit)
    report = {**found, "rank": distributed.rank()}
    lineage.close()
    write(Path(root) / "out", rank, report)
    torch.distributed.destroy_process_group()

"""The hook-mode digits loop of ``own_loop.py``, written to run under torchrun as well.

Under ``torchrun`` every process runs this script: it initialises the process group, gives its
training loader a ``DistributedSampler`` and wraps the student in ``DistributedDataParallel``;
filial finds the process group by itself. Launched plainly, the same script runs in one process.
``--batch-size`` is the global batch: each of W ranks takes ``batch_size // W`` per step, so the
two ways train on the same data with the same step size.

    torchrun --standalone --nproc-per-node=2 recipes/torchrun_loop.py --run-dir runs/torchrun
    python recipes/torchrun_loop.py --run-dir runs/one_process
"""

from __future__ import annotations

import argparse
import json
import os
import time

import torch
import torch.distributed as dist
from torch.nn.parallel import DistributedDataParallel
from torch.utils.data import DataLoader, DistributedSampler

import filial
from filial.demo import MLP, mail_room


def join_group() -> tuple[bool, bool]:
    """Join the process group when torchrun started this process: (launched, cuda)."""
    launched = dist.is_torchelastic_launched()  # set by torchrun
    cuda = torch.cuda.is_available()
    if launched:
        if cuda:
            torch.cuda.set_device(int(os.environ["LOCAL_RANK"]))
        dist.init_process_group("nccl" if cuda else "gloo")
    return launched, cuda


def main() -> None:
    parser = argparse.ArgumentParser()
    parser.add_argument("--epochs", type=int, default=30)
    parser.add_argument("--generations", type=int, default=3)
    parser.add_argument("--patience", type=int, default=2)
    parser.add_argument("--batch-size", type=int, default=64, help="global batch size")
    parser.add_argument("--threads", type=int, default=0, help="torch threads (0: default)")
    parser.add_argument("--run-dir", default="runs/torchrun")
    parser.add_argument("--fresh", action="store_true")
    parser.add_argument("--summary", help="rank 0 writes records and wall time here (JSON)")
    args = parser.parse_args()
    if args.threads:
        torch.set_num_threads(args.threads)

    launched, cuda = join_group()
    world = dist.get_world_size() if launched else 1
    main_rank = not launched or dist.get_rank() == 0
    device = torch.device("cuda", torch.cuda.current_device()) if cuda else torch.device("cpu")
    started = time.perf_counter()

    room = mail_room(noise=0.3, seed=0)
    sampler = DistributedSampler(room.train, seed=0) if launched else None
    train_loader = DataLoader(
        room.train,
        batch_size=max(1, args.batch_size // world),
        shuffle=sampler is None,
        sampler=sampler,
        generator=torch.Generator().manual_seed(0),
    )
    heldout_loader = DataLoader(room.heldout, batch_size=256)
    test_loader = DataLoader(room.test, batch_size=256)

    lineage = filial.Lineage(
        MLP(hidden=(256, 256)),
        train_loader,
        heldout_loader,
        run_dir=args.run_dir,
        targets="ce",
        max_generations=args.generations,
        patience=args.patience,
        test_loader=test_loader,
        fresh=args.fresh,
    )
    for gen in lineage:
        model = gen.model.to(device)
        if launched:
            model = DistributedDataParallel(model, device_ids=[device] if cuda else None)
        optimizer = torch.optim.SGD(model.parameters(), lr=0.05, momentum=0.9, weight_decay=5e-4)
        for _epoch in range(args.epochs):
            for inputs, labels, targets in gen.loader:  # this rank's shard
                inputs, labels = inputs.to(device), labels.to(device)
                loss = gen.loss(model(inputs), labels, targets)
                optimizer.zero_grad()
                loss.backward()
                optimizer.step()
        gen.finish(model)

    result = lineage.result
    seconds = time.perf_counter() - started
    if main_rank:
        gains = [
            f"{r['generation']}: " + ("diverged" if r["heldout"] is None else f"{r['heldout']:.3f}")
            for r in result.records
        ]
        print(f"{world} process(es): held-out by generation  {', '.join(gains)}")
        print(f"best generation {result.best}, stopped: {result.stop_reason}, {seconds:.1f} s")
        if args.summary:
            summary = {"world_size": world, "seconds": seconds, "records": result.records}
            with open(args.summary, "w", encoding="utf-8") as handle:
                json.dump(summary, handle)
    lineage.close()
    if launched:
        dist.destroy_process_group()


if __name__ == "__main__":
    main()

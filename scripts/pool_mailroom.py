"""The mail room with few labels: does self-training on the unlabelled envelopes help?

Noisy Student form (Xie et al. 2020): every teacher relabels the whole pool, the envelopes it
labels with top probability above ``--threshold`` are admitted with its soft targets, and each
student (a dropout MLP, the noised student; the teacher pass runs in eval mode, without
dropout) learns from the labelled envelopes' own labels and the admitted ones. Generation 0
trains on the labels alone for ``--first-epochs``, the students for ``--epochs``. Held-out
labels decide which generation is kept; the test split is only reported. Prints one JSON line
per seed and a summary (mean test accuracy of generation 0 and of the kept generation, their
mean gain, and the pseudo-labels' audit accuracy per generation).

    PYTHONPATH=src python scripts/pool_mailroom.py --seeds 0 1 2
"""

from __future__ import annotations

import argparse
import json
import statistics
import sys
import tempfile
import time
from pathlib import Path

import torch
from torch.utils.data import DataLoader, TensorDataset

import filial
from filial.demo import MLP, mail_room


def run_seed(seed: int, args: argparse.Namespace, root: Path) -> dict:
    room = mail_room(noise=0.0, seed=seed, train_size=args.train_size, heldout_size=300)
    x, y = room.train.tensors
    truth = room.clean_train_labels
    labelled = TensorDataset(x[: args.labels], y[: args.labels])
    pool = TensorDataset(x[args.labels :], truth[args.labels :])
    generator = torch.Generator().manual_seed(seed)
    lineage = filial.Lineage(
        MLP((256, 256), dropout=args.dropout),
        DataLoader(labelled, batch_size=32, shuffle=True, generator=generator),
        DataLoader(room.heldout, batch_size=256),
        test_loader=DataLoader(room.test, batch_size=256),
        run_dir=root / f"seed{seed}",
        unlabeled_loader=DataLoader(pool, batch_size=256),
        admission=filial.Admission(
            select="threshold", threshold=args.threshold, keep="relabel", pseudo="soft",
            audit=True,
        ),
        label_weight=1.0,  # labelled rows: their own labels; pool rows: the soft targets
        max_generations=args.generations,
        patience=args.generations,
        seed=seed,
        progress=False,
        tensorboard=False,
    )
    started = time.perf_counter()
    for gen in lineage:
        model = gen.model
        optimizer = torch.optim.Adam(model.parameters(), lr=1e-3, weight_decay=1e-4)
        epochs = args.first_epochs if gen.index == 0 else args.epochs
        model.train()
        for _ in range(epochs):
            for inputs, labels, targets in gen.loader:
                loss = gen.loss(model(inputs), labels, targets)
                optimizer.zero_grad()
                loss.backward()
                optimizer.step()
        gen.finish(model)
    result = lineage.result
    lineage.close()
    records = {r["generation"]: r for r in result.records}
    return {
        "seed": seed,
        "seconds": time.perf_counter() - started,
        "kept": result.best,
        "test": [records[g]["test"] for g in sorted(records)],
        "heldout": [records[g]["heldout"] for g in sorted(records)],
        "admitted": [records[g]["pool"]["admitted"] for g in sorted(records)],
        "audit": [records[g]["pool"]["audit_accuracy"] for g in sorted(records)],
    }


def main(argv: list[str] | None = None) -> int:
    parser = argparse.ArgumentParser(description=__doc__.splitlines()[0])
    parser.add_argument("--seeds", type=int, nargs="+", default=[0, 1, 2])
    parser.add_argument("--labels", type=int, default=60)
    parser.add_argument("--train-size", type=int, default=1300)  # 60 labelled, 1,240 pool
    parser.add_argument("--threshold", type=float, default=0.5)
    parser.add_argument("--dropout", type=float, default=0.3)
    parser.add_argument("--first-epochs", type=int, default=200)
    parser.add_argument("--epochs", type=int, default=60)
    parser.add_argument("--generations", type=int, default=3)
    args = parser.parse_args(argv)
    torch.set_num_threads(1)
    found = []
    with tempfile.TemporaryDirectory() as folder:
        for seed in args.seeds:
            row = run_seed(seed, args, Path(folder))
            print(json.dumps(row), flush=True)
            found.append(row)
    first = [r["test"][0] for r in found]
    kept = [r["test"][r["kept"]] for r in found]
    summary = {
        "generation0_test_mean": statistics.mean(first),
        "kept_test_mean": statistics.mean(kept),
        "mean_gain": statistics.mean(k - f for k, f in zip(kept, first, strict=True)),
        "kept": [r["kept"] for r in found],
        "seconds_mean": statistics.mean(r["seconds"] for r in found),
    }
    print(json.dumps(summary))
    return 0


if __name__ == "__main__":
    sys.exit(main())

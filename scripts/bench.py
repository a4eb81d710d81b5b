"""Cost of filial against plain PyTorch loops, measured side by side in one process.

Each figure alternates the two sides (A B A B ...) after a warm-up, reports the median ratio and
the min-max spread of the per-repetition ratios, with torch's thread count fixed. Nothing here is
asserted by the test suite; it prints a table and writes bench.json.
"""

from __future__ import annotations

import argparse
import json
import statistics
import tempfile
import time
from collections.abc import Callable
from pathlib import Path

import torch
import torch.nn.functional as F

import filial
from filial.demo import MLP, mail_room
from filial.generation import predict


def _alternate(a: Callable[[], None], b: Callable[[], None], repeats: int) -> dict[str, float]:
    a(), b()  # warm-up
    times_a, times_b = [], []
    for _ in range(repeats):
        for fn, sink in ((a, times_a), (b, times_b)):
            start = time.perf_counter()
            fn()
            sink.append(time.perf_counter() - start)
    ratios = [x / y for x, y in zip(times_a, times_b, strict=True)]
    return {
        "a_median_s": statistics.median(times_a),
        "b_median_s": statistics.median(times_b),
        "ratio_median": statistics.median(ratios),
        "ratio_min": min(ratios),
        "ratio_max": max(ratios),
    }


def main() -> int:
    parser = argparse.ArgumentParser(prog="scripts/bench")
    parser.add_argument("--repeats", type=int, default=7)
    parser.add_argument("--threads", type=int, default=2)
    parser.add_argument("--out", default="bench.json")
    args = parser.parse_args()
    torch.set_num_threads(args.threads)

    room = mail_room(noise=0.3, seed=0)
    train, heldout, _ = room.loaders(batch_size=64, seed=0)
    model_fn = MLP((256, 256))
    run_dir = Path(tempfile.mkdtemp(prefix="filial-bench-"))
    lineage = filial.Lineage(model_fn, train, heldout, run_dir=run_dir, max_generations=1)
    gens = iter(lineage)
    gen0 = next(gens)
    gen0.finish(gen0.model)
    gen1 = next(gens)  # a student with cached targets
    model = gen1.model
    opt = torch.optim.SGD(model.parameters(), lr=0.01, momentum=0.9)

    def plain_epoch() -> None:
        for inputs, labels in train:
            loss = F.cross_entropy(model(inputs), labels)
            opt.zero_grad()
            loss.backward()
            opt.step()

    def hook_epoch() -> None:
        for inputs, labels, targets in gen1.loader:
            loss = gen1.loss(model(inputs), labels, targets)
            opt.zero_grad()
            loss.backward()
            opt.step()

    def hook_epoch_generation0() -> None:
        for inputs, labels, targets in gen0.loader:  # targets is None: the same loss as plain
            loss = gen0.loss(model(inputs), labels, targets)
            opt.zero_grad()
            loss.backward()
            opt.step()

    def teacher_pass() -> None:
        predict(model, train, seed=0)

    def plain_inference() -> None:
        model.eval()
        with torch.inference_mode():
            for inputs, _labels in train:
                model(inputs)
        model.train()

    figures = {
        "generation0_epoch_vs_plain_epoch": _alternate(
            hook_epoch_generation0, plain_epoch, args.repeats
        ),
        "student_epoch_vs_plain_epoch": _alternate(hook_epoch, plain_epoch, args.repeats),
        "teacher_pass_vs_plain_inference": _alternate(teacher_pass, plain_inference, args.repeats),
        "teacher_pass_vs_training_epoch": _alternate(teacher_pass, hook_epoch, args.repeats),
    }
    report = {
        "threads": args.threads,
        "repeats": args.repeats,
        "data": "mail-room digits, 1000 train samples, batch 64, MLP 64-256-256-10",
        "figures": figures,
    }
    Path(args.out).write_text(json.dumps(report, indent=2) + "\n")
    print(f"{'figure':<34} {'A median':>10} {'B median':>10} {'A/B':>7}  spread")
    for name, f in figures.items():
        print(
            f"{name:<34} {f['a_median_s'] * 1e3:>8.2f}ms {f['b_median_s'] * 1e3:>8.2f}ms "
            f"{f['ratio_median']:>7.3f}  {f['ratio_min']:.3f}-{f['ratio_max']:.3f}"
        )
    print(f"wrote {args.out}")
    return 0


if __name__ == "__main__":
    raise SystemExit(main())

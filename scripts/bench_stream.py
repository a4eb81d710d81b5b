"""The teacher pass at scale: memory and speed of ``gen.finish``, the store's write, replay.

Each measurement runs in a process of its own (``python scripts/bench_stream.py KIND ...``,
printing one JSON object), so that the kernel's peak-RSS counter (``VmHWM`` in
``/proc/self/status``, reset through ``/proc/self/clear_refs`` just before the measured call)
sees only that call, and so that the same measurement can run against another checkout of
filial (``PYTHONPATH=OTHER/src``: ``scripts/bench --before OTHER`` puts the figures of the code
before a change beside those of this one). Only public names that both sides have are used:
``filial.Lineage``, ``gen.finish``, ``TargetStore.write``, ``filial.data.sequential_loader``
and ``filial.data.Replay``; the streamed writer (``filial.store.StoreWriter``) where it exists.

The data: ``IndexBuilt``, inputs of 32 numbers looked up from the sample's index (so that the
dataset's own memory is nothing), labels ``index % 1000``, and ``nn.Linear(32, 1000)``: the
memory is filial's own. Linux only (``/proc``).

Kinds:

``finish N --views V [--top-k K] [--world 2] [--once]``
    extra peak RSS of ``gen.finish`` of generation 0 and 1 (no training), the time of each
    finish, and of a plain ``inference_mode`` loop over the same loader between them
    (A B A B), in wall seconds and in CPU seconds of the process (on a machine shared with
    other jobs the CPU time is the steadier figure). ``--world 2``: two gloo ranks (spawned),
    each reporting its own figures. ``--once``: generation 0 only, without the plain loop (the
    memory figure alone, for the largest sizes).
``write N``
    the time to write an N x 1000 float16 store from rows already made: the streamed writer
    batch by batch where it exists, else ``TargetStore.write`` of the whole array.
``replay N [--generators all|torch]``
    per-row cost of a replayed pass (``sequential_loader`` with a ``Replay``) against a plain
    pass over the same augmenting data, the same model; the augmentation draws from torch's
    and Python's generators, or (``torch``, as torchvision's transforms do) torch's only.
"""

from __future__ import annotations

import argparse
import json
import random
import statistics
import sys
import tempfile
import time
from pathlib import Path
from typing import Any

import numpy as np
import torch
from torch import nn
from torch.utils.data import DataLoader, Dataset

CLASSES, WIDTH, BATCH = 1000, 32, 256


def status(key: str) -> int:
    """A field of ``/proc/self/status`` in KiB (``VmHWM``: the peak resident set size)."""
    with open("/proc/self/status", encoding="ascii") as handle:
        for line in handle:
            if line.startswith(key + ":"):
                return int(line.split()[1])
    raise KeyError(key)


def reset_peak() -> int:
    """Reset the kernel's peak-RSS counter to the current RSS (Linux >= 4.0); return it."""
    with open("/proc/self/clear_refs", "w", encoding="ascii") as handle:
        handle.write("5")
    return status("VmRSS")


class IndexBuilt(Dataset):
    """Inputs looked up from the index (a fixed 4096 x 32 table), labels ``index % 1000``."""

    def __init__(self, n: int, offset: int = 0, noise: float = 0.0, python: bool = True) -> None:
        self.n, self.offset, self.noise, self.python = n, offset, noise, python
        self.table = torch.randn(4096, WIDTH, generator=torch.Generator().manual_seed(1))

    def __len__(self) -> int:
        return self.n

    def __getitem__(self, index: int) -> tuple[torch.Tensor, int]:
        i = index + self.offset
        x = self.table[i & 4095]
        if self.noise:  # random augmentation from torch's (and Python's) global generators
            x = x + self.noise * torch.randn(WIDTH)
            flip = random.random() if self.python else float(torch.rand(()))
            x = -x if flip < 0.5 else x
        return x, i % CLASSES


def linear() -> nn.Module:
    return nn.Linear(WIDTH, CLASSES)


def plain_pass(model: nn.Module, loader: DataLoader) -> tuple[float, float]:
    """Wall and CPU seconds (all threads of this process) of a plain inference loop."""
    model.eval()
    start, cpu = time.perf_counter(), time.process_time()
    with torch.inference_mode():
        for x, _ in loader:
            model(x)
    return time.perf_counter() - start, time.process_time() - cpu


def _finish_job(rank: int, world: int, args: argparse.Namespace, out: str) -> None:
    import filial

    torch.set_num_threads(args.threads)
    if world > 1:
        torch.distributed.init_process_group(
            "gloo", init_method=f"file://{out}.rendezvous", rank=rank, world_size=world
        )
    train = IndexBuilt(args.n)
    sampler = None
    if world > 1:
        sampler = torch.utils.data.DistributedSampler(train, shuffle=False)
    loader = DataLoader(train, batch_size=BATCH, sampler=sampler)
    heldout = DataLoader(IndexBuilt(1000, offset=args.n), batch_size=BATCH)
    lineage = filial.Lineage(
        linear,
        loader,
        heldout,
        run_dir=Path(args.run_dir),
        views=args.views,
        top_k=args.top_k or None,
        store_dtype=args.dtype,
        max_generations=0 if args.once else 1,
        patience=5,
        progress=False,
        tensorboard=False,
    )
    lineage.rule.collapsed = lambda record, first: None  # nothing is learnt here
    figures: dict[str, Any] = {"rank": rank, "world": world, "n": args.n, "views": args.views}
    peaks, finishes, plains, finish_cpu, plain_cpu = [], [], [], [], []
    for gen in lineage:
        if not args.once:
            wall, cpu = plain_pass(gen.model, loader)
            plains.append(wall)
            plain_cpu.append(cpu)
        before = reset_peak()
        start, cpu = time.perf_counter(), time.process_time()
        gen.finish(gen.model)
        finishes.append(time.perf_counter() - start)
        finish_cpu.append(time.process_time() - cpu)
        peaks.append(status("VmHWM") - before)
        figures.setdefault("rss_before_kib", before)
    lineage.close()
    store = Path(args.run_dir) / "gen0"
    figures.update(
        extra_peak_kib=peaks[0],
        extra_peak_kib_each=peaks,
        finish_s=finishes,
        plain_s=plains,
        finish_cpu_s=finish_cpu,
        plain_cpu_s=plain_cpu,
        store_bytes=sum(p.stat().st_size for p in store.glob("targets*.npy")),
    )
    if world > 1:
        torch.distributed.destroy_process_group()
    Path(f"{out}.{rank}").write_text(json.dumps(figures))


def finish(args: argparse.Namespace) -> Any:
    with tempfile.TemporaryDirectory(prefix="filial-bench-", dir=args.work) as work:
        args.run_dir = str(Path(work) / "run")
        out = str(Path(work) / "figures")
        if args.world == 1:
            _finish_job(0, 1, args, out)
        else:
            torch.multiprocessing.spawn(
                _finish_job, args=(args.world, args, out), nprocs=args.world
            )
        return [json.loads(Path(f"{out}.{r}").read_text()) for r in range(args.world)]


def write(args: argparse.Namespace) -> Any:
    """Write an N x 1000 float16 store from rows made in advance (a block reused)."""
    from filial import store as stores

    rng = np.random.default_rng(0)
    block = rng.standard_normal((BATCH, CLASSES)).astype(np.float32)
    with tempfile.TemporaryDirectory(prefix="filial-bench-", dir=args.work) as work:
        folder = Path(work)
        if hasattr(stores, "StoreWriter"):
            rows16 = block.astype(np.float16)
            start = time.perf_counter()
            writer = stores.StoreWriter.create(
                folder, count=args.n, views=1, classes=CLASSES, dtype="float16"
            )
            for first in range(0, args.n, BATCH):
                codes = np.arange(first, min(first + BATCH, args.n))
                writer.put(codes, rows16[: len(codes)])
            writer.publish(peak=float(np.abs(block).max()), fingerprint="b", teacher_sha256="b")
            seconds = time.perf_counter() - start
            how = "StoreWriter, batch by batch"
        else:
            outputs = np.empty((args.n, 1, CLASSES), dtype=np.float32)
            for first in range(0, args.n, BATCH):
                stop = min(first + BATCH, args.n)
                outputs[first:stop, 0] = block[: stop - first]
            start = time.perf_counter()
            stores.TargetStore.write(
                folder, outputs, dtype="float16", fingerprint="b", teacher_sha256="b"
            )
            seconds = time.perf_counter() - start
            how = "TargetStore.write of the whole array"
        size = (folder / "targets.npy").stat().st_size
    return {"n": args.n, "seconds": seconds, "us_per_row": seconds / args.n * 1e6, "bytes": size,
            "how": how}  # fmt: skip


def replay(args: argparse.Namespace) -> Any:
    """A replayed pass against a plain pass over the same augmenting data (A B A B ...)."""
    from filial.data import Replay, sequential_loader

    torch.set_num_threads(args.threads)
    data = IndexBuilt(args.n, noise=0.1, python=args.generators == "all")
    loader = DataLoader(data, batch_size=BATCH)
    model = nn.Sequential(nn.Linear(WIDTH, 256), nn.ReLU(), nn.Linear(256, 10)).eval()
    replayed = Replay(7, 1)

    def plain() -> None:
        with torch.inference_mode():
            for x, _ in loader:
                model(x)

    def ours() -> None:
        with torch.inference_mode():
            for _, x, _ in sequential_loader(loader, 0, replayed):
                model(x)

    plain(), ours()
    times: dict[str, list[float]] = {"plain": [], "replayed": [], "plain_cpu": [], "cpu": []}
    for _ in range(args.repeats):
        for name, run in (("plain", plain), ("replayed", ours)):
            start, cpu = time.perf_counter(), time.process_time()
            run()
            times[name].append((time.perf_counter() - start) / args.n * 1e6)
            times["plain_cpu" if name == "plain" else "cpu"].append(
                (time.process_time() - cpu) / args.n * 1e6
            )
    ratios = [r / p for r, p in zip(times["replayed"], times["plain"], strict=True)]
    cpu_ratios = [r / p for r, p in zip(times["cpu"], times["plain_cpu"], strict=True)]
    return {
        "n": args.n,
        "plain_us_per_row": statistics.median(times["plain"]),
        "replayed_us_per_row": statistics.median(times["replayed"]),
        "ratio_median": statistics.median(ratios),
        "ratio_min": min(ratios),
        "ratio_max": max(ratios),
        "cpu_ratio_median": statistics.median(cpu_ratios),
    }


def main(argv: list[str] | None = None) -> int:
    parser = argparse.ArgumentParser(description=__doc__.split("\n")[0])
    parser.add_argument("kind", choices=("finish", "write", "replay"))
    parser.add_argument("n", type=int)
    parser.add_argument("--views", type=int, default=1)
    parser.add_argument("--top-k", type=int, default=0)
    parser.add_argument("--dtype", default="float16")
    parser.add_argument("--world", type=int, default=1)
    parser.add_argument("--threads", type=int, default=2)
    parser.add_argument("--repeats", type=int, default=5)
    parser.add_argument("--work", default=None, help="folder for the temporary run directories")
    parser.add_argument(
        "--once", action="store_true", help="finish: generation 0 only, no plain loop (memory)"
    )
    parser.add_argument(
        "--generators",
        choices=("all", "torch"),
        default="all",
        help="replay: augmentation drawing from torch's and Python's generators, or torch's only",
    )
    args = parser.parse_args(argv)
    result = {"finish": finish, "write": write, "replay": replay}[args.kind](args)
    import filial

    print(json.dumps({"filial": str(Path(filial.__file__).parent), "result": result}))
    return 0


if __name__ == "__main__":
    sys.exit(main())

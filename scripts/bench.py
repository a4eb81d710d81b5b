"""What filial costs against plain PyTorch loops, measured side by side in one process.

Every figure alternates its two sides (A B A B ...) after a warm-up, over at least five
repetitions, and reports the median of the per-repetition ratios A/B with their min-max spread;
torch's thread count is fixed. Nothing here is asserted by the test suite (a quick mode only
checks that the script runs and writes well-formed JSON). The table is printed and written to
``bench.json``.

Figures and goals:

* student epoch overhead: a hook-mode epoch over ``gen.loader`` / the plain loop the user would
  write, same model, data, batch size and seed. Generation 0: the plain loop trains on the labels.
  A student: the plain loop reads the same targets from an in-memory tensor (a hand-written
  distillation loop). Digits MLP, and a small CNN on 32x32 random images (the equivalent of
  torchvision's FakeData, made here with learnable labels). Goal <= 1.02.
* teacher pass: samples/s of filial's teacher pass (streamed into a float16 store, published,
  with the record's figures) / samples/s of a plain ``no_grad`` loop over the same data, digits
  MLP. Goal >= 0.95.
* cache versus online teacher: a cached student epoch / a ``teacher_mode="online"`` epoch (a
  teacher of the student's size runs on every batch), on the digits MLP and on the CIFAR
  ResNet-20 over torchvision's FakeData with the recipes' transforms (``filial.vision``; the
  only figure that needs torchvision). Reported; expected < 0.8.
* store gather: 256 random rows per batch from an N x 1000 float16 memory-mapped store (the OS
  cache warmed), against the same gather from an in-memory array. Goal ratio <= 3 and < 1 ms.
* lineage overhead: wall time of a 3-generation digits lineage / the sum of its training
  epochs and teacher passes. Goal <= 1.05.
* compact store: bytes per sample of full and top_k=10 stores at C = 10, 100 and 1000 (float16
  values, int16 classes). Goal <= 60 at C = 1000.
* the teacher pass at scale (``scripts/bench_stream.py``, one process per measurement, so that
  the kernel's peak-RSS counter sees only ``gen.finish``): ``nn.Linear(32, 1000)`` over a
  dataset that builds its inputs from the index, N = 100,000 (and 1,281,167 with ``--large``).
  Extra peak RSS of ``gen.finish``: goal <= 512 MiB for the full store at views=1 and for
  top_k=10 at views=4, and for rank 0 and rank 1 of two gloo ranks (at 25,000 and 100,000
  samples: the figure must not grow with N). Teacher pass samples/s (``finish``, writing
  included) / a plain ``inference_mode`` loop over the same loader: goal >= 0.95. A replayed
  pass per row / a plain pass over the same augmenting data: goal <= 1.3. Store write time per
  row at 1,281,167 / at 100,000: goal <= 1.2 (``--large``). ``--before CHECKOUT`` runs the same
  measurements against another checkout's ``src`` (the code before a change) and puts its
  figures beside these.
* a student epoch with an unlabelled pool: ``gen.loader`` of mixed batches (labelled rows and
  admitted pool rows, targets gathered from two stores) with ``gen.loss`` / a plain loop over
  one in-memory dataset of the same samples, labels and targets with a hand-written loss,
  digits MLP, 100 labels and 897 admitted. Goal <= 1.05.
* early-stopping baseline: the early-stopped baseline (held-out scored after every epoch, the
  best epoch's weights kept) / the matched baseline (the same training, judged at its last
  epoch), digits MLP, 300 held-out samples against 1,000 training samples. Goal <= 1.15.
"""

from __future__ import annotations

import argparse
import functools
import json
import os
import shutil
import statistics
import subprocess
import sys
import tempfile
import time
from collections.abc import Callable
from pathlib import Path
from typing import Any

import numpy as np
import torch
import torch.nn.functional as F
from torch import nn
from torch.utils.data import DataLoader, TensorDataset

import filial
import filial.generation
from filial.demo import MLP, mail_room
from filial.losses import StudentLoss
from filial.metrics import accuracy, as_float_metric
from filial.store import TargetStore
from filial.teacher import FigureSpec, StoreSpec, training_pass

# The mail room's sizes: the demo's, or (--quick) a few hundred envelopes for a smoke run.
ROOM_SIZES: dict[str, int] = {}


def digits_room() -> Any:
    """The mail-room digits every digits figure uses (smaller under ``--quick``)."""
    return mail_room(noise=0.3, seed=0, **ROOM_SIZES)


def alternate(
    a: Callable[[], Any], b: Callable[[], Any], repeats: int, inner: int = 1
) -> dict[str, float]:
    """Time ``a`` and ``b`` alternately after one warm-up each; medians and ratio spread.

    Each timing sample runs its side ``inner`` times, so that short calls are not lost in the
    clock's and the scheduler's noise; the times reported are per call.
    """
    a(), b()
    times_a, times_b = [], []
    for _ in range(repeats):
        for fn, sink in ((a, times_a), (b, times_b)):
            start = time.perf_counter()
            for _ in range(inner):
                fn()
            sink.append((time.perf_counter() - start) / inner)
    ratios = [x / y for x, y in zip(times_a, times_b, strict=True)]
    return {
        "a_median_s": statistics.median(times_a),
        "b_median_s": statistics.median(times_b),
        "ratio_median": statistics.median(ratios),
        "ratio_min": min(ratios),
        "ratio_max": max(ratios),
    }


class SmallCNN:
    """A picklable model_fn: a small CNN for 3x32x32 images."""

    def __call__(self) -> nn.Module:
        return nn.Sequential(
            nn.Conv2d(3, 16, 3, padding=1),
            nn.ReLU(),
            nn.MaxPool2d(2),
            nn.Conv2d(16, 32, 3, padding=1),
            nn.ReLU(),
            nn.MaxPool2d(2),
            nn.Flatten(),
            nn.Linear(32 * 8 * 8, 10),
        )


def random_images(n: int, seed: int) -> TensorDataset:
    """Random 3x32x32 images, as torchvision's FakeData makes them, but with learnable labels
    (one of ten fixed random prototypes plus noise) so that a short lineage does not stop on a
    collapsed generation 0. Made here."""
    prototypes = torch.rand(10, 3, 32, 32, generator=torch.Generator().manual_seed(1234))
    g = torch.Generator().manual_seed(seed)
    labels = torch.randint(0, 10, (n,), generator=g)
    images = (prototypes[labels] + 0.5 * torch.rand(n, 3, 32, 32, generator=g)).clamp(0, 1)
    return TensorDataset(images, labels)


def _two_generations(
    model_fn, train: DataLoader, heldout: DataLoader, run_dir: Path, teacher_mode: str = "cached"
):
    lineage = filial.Lineage(
        model_fn,
        train,
        heldout,
        run_dir=run_dir,
        max_generations=1,
        progress=False,
        tensorboard=False,
        teacher_mode=teacher_mode,
    )
    # Timing needs a student whatever generation 0 learned: no collapse stop here.
    lineage.rule.collapsed = lambda record, first: None
    gens = iter(lineage)
    gen0 = next(gens)
    opt = torch.optim.SGD(gen0.model.parameters(), lr=0.05, momentum=0.9)
    for x, y, _ in gen0.loader:  # one epoch, so that generation 0 is a teacher worth the name
        loss = gen0.loss(gen0.model(x), y, None)
        opt.zero_grad()
        loss.backward()
        opt.step()
    gen0.finish(gen0.model)
    return gen0, next(gens), lineage


def student_overhead(model_fn, dataset, heldout, batch, repeats, work: Path) -> dict[str, Any]:
    """Hook-mode epochs against plain loops, for generation 0 and for a student."""
    train = DataLoader(
        dataset, batch_size=batch, shuffle=True, generator=torch.Generator().manual_seed(0)
    )
    gen0, gen1, _ = _two_generations(model_fn, train, DataLoader(heldout, batch_size=256), work)
    targets = torch.from_numpy(gen1.store.read_all()[:, 0, :])
    inputs, labels = dataset.tensors
    distill = DataLoader(
        TensorDataset(inputs, labels, targets),
        batch_size=batch,
        shuffle=True,
        generator=torch.Generator().manual_seed(0),
    )
    model = gen1.model
    opt = torch.optim.SGD(model.parameters(), lr=0.01, momentum=0.9)
    loss_fn = StudentLoss("ce")

    def step(loss: torch.Tensor) -> None:
        opt.zero_grad()
        loss.backward()
        opt.step()

    def hook(gen) -> Callable[[], None]:
        def epoch() -> None:
            for x, y, t in gen.loader:
                step(gen.loss(model(x), y, t))

        return epoch

    def plain_labels() -> None:
        for x, y in train:
            step(F.cross_entropy(model(x), y))

    def plain_targets() -> None:
        for x, y, t in distill:
            step(loss_fn(model(x), y, t))

    return {
        "generation0": alternate(hook(gen0), plain_labels, repeats, inner=3),
        "student": alternate(hook(gen1), plain_targets, repeats, inner=3),
    }


def pool_student_overhead(repeats: int, work: Path, quick: bool) -> dict[str, Any]:
    """A student epoch with an unlabelled pool (mixed batches of labelled rows and admitted
    pool rows, targets from two stores) against a plain loop over the same samples: one
    in-memory TensorDataset of the labelled and the admitted inputs, their labels (-1 for the
    pool's), and their targets, the loss written by hand (cross-entropy on labelled rows, soft
    cross-entropy on pool rows). Digits MLP, 100 labels, the rest of the training split as
    the pool, everything admitted."""
    room = mail_room(noise=0.0, seed=0)
    x, y = room.train.tensors
    labels, pool_size = (32, 96) if quick else (100, len(x) - 100)
    labelled = TensorDataset(x[:labels], y[:labels])
    pool_inputs = x[labels : labels + pool_size]
    train = DataLoader(
        labelled, batch_size=64, shuffle=True, generator=torch.Generator().manual_seed(0)
    )
    lineage = filial.Lineage(
        MLP((256, 256)),
        train,
        DataLoader(room.heldout, batch_size=256),
        run_dir=work / "pool",
        max_generations=1,
        progress=False,
        tensorboard=False,
        label_weight=1.0,
        unlabeled_loader=DataLoader(TensorDataset(pool_inputs), batch_size=256),
        admission=filial.Admission(select="everything"),
    )
    lineage.rule.collapsed = lambda record, first: None
    gens = iter(lineage)
    gen0 = next(gens)
    gen0.finish(gen0.model)
    gen1 = next(gens)
    assert gen1.pool_teacher is not None and gen1.store is not None
    admitted = gen1.pool_teacher.admitted.index
    targets = torch.cat(
        [
            torch.from_numpy(gen1.store.read_all()[:, 0, :]),
            torch.from_numpy(gen1.pool_teacher.store.read_all()[admitted, 0, :]),
        ]
    )
    plain = DataLoader(
        TensorDataset(
            torch.cat([x[:labels], pool_inputs[torch.from_numpy(admitted)]]),
            torch.cat([y[:labels], torch.full((len(admitted),), -1)]),
            targets,
        ),
        batch_size=64,
        shuffle=True,
        generator=torch.Generator().manual_seed(0),
    )
    model = gen1.model
    opt = torch.optim.SGD(model.parameters(), lr=0.01, momentum=0.9)

    def step(loss: torch.Tensor) -> None:
        opt.zero_grad()
        loss.backward()
        opt.step()

    def ours() -> None:
        for inputs, batch_labels, batch_targets in gen1.loader:
            step(gen1.loss(model(inputs), batch_labels, batch_targets))

    def by_hand() -> None:
        for inputs, batch_labels, batch_targets in plain:
            out = model(inputs)
            pool = batch_labels == -1
            hard = F.cross_entropy(out, batch_labels.clamp(min=0), reduction="none")
            soft = -(F.softmax(batch_targets, 1) * F.log_softmax(out, 1)).sum(1)
            step(torch.where(pool, soft, hard).mean())

    # A ~50 ms epoch: ten per timing sample, so that the clock and the scheduler's noise
    # (other processes on the cores) weigh less.
    figure = alternate(ours, by_hand, repeats, inner=2 if quick else 10)
    figure["samples_per_epoch"] = labels + len(admitted)
    lineage.close()
    return figure


def teacher_pass(repeats: int, work: Path) -> dict[str, Any]:
    """The streamed teacher pass (the store written and published, the record's figures
    summed) against a plain ``no_grad`` loop over the same data, digits MLP."""
    room = digits_room()
    train, heldout, _ = room.loaders(batch_size=64, seed=0)
    model = MLP((256, 256))()
    spec = StoreSpec("float16", 1, None, "bench")
    figures = FigureSpec("ce", 1.0, as_float_metric(accuracy, "accuracy"))

    # The pass streams its rows into the store's temporary file and sums the record's figures;
    # publishing (fsync, rename, manifest) is a fixed cost per generation, timed apart below.
    def ours() -> None:
        passed = training_pass(
            model, train, None, 0, store=(spec, work / "teacher"), figures=figures
        )
        assert passed is not None and passed.store is not None
        passed.store.discard()

    def published() -> float:
        passed = training_pass(
            model, train, None, 0, store=(spec, work / "teacher"), figures=figures
        )
        assert passed is not None and passed.store is not None
        start = time.perf_counter()
        passed.store.publish("bench", "bench")
        return time.perf_counter() - start

    def plain() -> None:
        model.eval()
        with torch.no_grad():
            for x, _y in train:
                model(x)
        model.train()

    timing = alternate(ours, plain, repeats, inner=10)
    timing["publish_ms_median"] = 1000 * statistics.median(published() for _ in range(repeats))
    # samples/s ratio = inverse time ratio
    timing["throughput_ratio_median"] = 1.0 / timing["ratio_median"]
    timing["throughput_ratio_min"] = 1.0 / timing["ratio_max"]
    timing["throughput_ratio_max"] = 1.0 / timing["ratio_min"]
    return timing


def cache_versus_online(
    repeats: int, work: Path, model_fn=None, train=None, heldout=None, inner: int = 3
) -> dict[str, Any]:
    """A student epoch over the cache against one with teacher_mode='online' (the teacher, of
    the student's size, runs on every batch). Default: the digits MLP."""
    if model_fn is None:
        room = digits_room()
        train, heldout, _ = room.loaders(batch_size=64, seed=0)
        model_fn = MLP((256, 256))
    _, cached_gen, _ = _two_generations(model_fn, train, heldout, work / "cached")
    _, online_gen, _ = _two_generations(
        model_fn, train, heldout, work / "online", teacher_mode="online"
    )
    model = cached_gen.model
    opt = torch.optim.SGD(model.parameters(), lr=0.01, momentum=0.9)

    def epoch(gen) -> Callable[[], None]:
        def run() -> None:
            for x, y, t in gen.loader:
                loss = gen.loss(model(x), y, t)
                opt.zero_grad()
                loss.backward()
                opt.step()

        return run

    return alternate(epoch(cached_gen), epoch(online_gen), repeats, inner=inner)


def cache_versus_online_cifar(repeats: int, work: Path, quick: bool) -> dict[str, Any]:
    """The same on the CIFAR ResNet-20 over torchvision's FakeData (512 images, batch 64, the
    recipes' crop-and-flip transforms, loading in the main process); quick: ResNet-8, 64."""
    from filial.vision import CifarResNet, cifar_loaders

    depth, images = (8, 64) if quick else (20, 512)
    train, heldout, _ = cifar_loaders(
        source="fake", subset=images, heldout_size=64, test_subset=1, batch_size=64, workers=0
    )
    timing = cache_versus_online(
        repeats, work, functools.partial(CifarResNet, depth, 10), train, heldout, inner=1
    )
    timing["depth"], timing["images"], timing["batch"] = depth, images, 64
    return timing


def store_gather(rows: int, repeats: int, work: Path) -> dict[str, Any]:
    classes, batch = 1000, 256
    rng = np.random.default_rng(0)
    array = np.empty((rows, 1, classes), dtype=np.float16)
    chunk = 65536
    block = rng.standard_normal((chunk, 1, classes)).astype(np.float16)
    for start in range(0, rows, chunk):
        stop = min(start + chunk, rows)
        array[start:stop] = block[: stop - start]
    folder = work / "gather"
    store = TargetStore.write(
        folder, array, dtype="float16", fingerprint="bench", teacher_sha256="bench"
    )
    with open(folder / TargetStore.ARRAY, "rb") as handle:  # warm the OS cache
        while handle.read(1 << 24):
            pass
    memory = TargetStore(folder)
    memory._array = array  # the same gather code over an in-memory array
    draws = [rng.integers(0, rows, batch) for _ in range(200)]

    def mapped() -> None:
        for idx in draws:
            store.gather(idx)

    def in_memory() -> None:
        for idx in draws:
            memory.gather(idx)

    timing = alternate(mapped, in_memory, repeats)
    timing["rows"], timing["classes"], timing["batch"] = rows, classes, batch
    timing["mapped_ms_per_batch"] = timing["a_median_s"] / len(draws) * 1e3
    timing["memory_ms_per_batch"] = timing["b_median_s"] / len(draws) * 1e3
    timing["file_bytes"] = (folder / TargetStore.ARRAY).stat().st_size
    shutil.rmtree(folder)
    return timing


def lineage_overhead(epochs: int, work: Path) -> dict[str, Any]:
    """Wall time of a 3-generation lineage / (its training epochs + teacher passes)."""
    room = digits_room()
    train, heldout, test = room.loaders(batch_size=64, seed=0)
    spent = {"fit": 0.0, "teacher": 0.0}
    fit = filial.fit_epochs(
        epochs, lambda p: torch.optim.SGD(p, lr=0.05, momentum=0.9), progress=False
    )
    original = filial.generation.training_pass

    def timed_pass(*args, **kwargs):
        start = time.perf_counter()
        result = original(*args, **kwargs)
        spent["teacher"] += time.perf_counter() - start
        return result

    def timed_fit(gen):
        start = time.perf_counter()
        model = fit(gen)
        spent["fit"] += time.perf_counter() - start
        return model

    filial.generation.training_pass = timed_pass
    try:
        start = time.perf_counter()
        lineage = filial.Lineage(
            MLP((256, 256)),
            train,
            heldout,
            run_dir=work / "lineage",
            max_generations=2,
            patience=5,
            test_loader=test,
            progress=False,
        )
        lineage.run(timed_fit)
        wall = time.perf_counter() - start
    finally:
        filial.generation.training_pass = original
    work_s = spent["fit"] + spent["teacher"]
    return {
        "wall_s": wall,
        "training_s": spent["fit"],
        "teacher_s": spent["teacher"],
        "ratio": wall / work_s,
        "generations": 3,
        "epochs_per_generation": epochs,
    }


def early_stopping_cost(epochs: int, repeats: int, work: Path) -> dict[str, Any]:
    """The early-stopped baseline / the matched baseline of one finished lineage (both train
    for the lineage's epochs; the first also scores the held-out set after every epoch)."""
    room = digits_room()
    train, heldout, _ = room.loaders(batch_size=64, seed=0)

    def make_fit(count: int) -> filial.fit.EpochFit:
        return filial.fit_epochs(
            count, lambda p: torch.optim.SGD(p, lr=0.05, momentum=0.9), progress=False
        )

    run_dir = work / "baselines"
    lineage = filial.Lineage(
        MLP((256, 256)),
        train,
        heldout,
        run_dir=run_dir,
        max_generations=1,
        patience=5,
        progress=False,
        tensorboard=False,
    )
    lineage.run(make_fit(epochs))

    def side(name: str) -> Callable[[], Any]:
        def train_again() -> Any:
            shutil.rmtree(run_dir / "baseline" / name, ignore_errors=True)
            return lineage.baseline(name, make_fit)

        return train_again

    figure = alternate(side("early-stopping"), side("matched"), repeats)
    lineage.close()
    return {**figure, "epochs": 2 * epochs, "heldout": len(room.heldout), "train": len(room.train)}


def compact_store(work: Path) -> dict[str, Any]:
    """Bytes per sample of full and top-k stores (float16 values) at C = 10, 100 and 1000."""
    result: dict[str, Any] = {}
    outputs = {c: np.random.default_rng(0).normal(size=(64, 1, c)) for c in (10, 100, 1000)}
    for classes, array in outputs.items():
        full = TargetStore.write(
            work / f"full{classes}", array, fingerprint="b", teacher_sha256="b"
        )
        top = TargetStore.write(
            work / f"top{classes}", array, fingerprint="b", teacher_sha256="b", top_k=10
        )
        result[str(classes)] = {
            "full": full.manifest["bytes_per_sample"],
            "top_k_10": top.manifest["bytes_per_sample"],
        }
    result["bytes_per_sample"] = result["1000"]["top_k_10"]
    return result


IMAGENET = 1_281_167
_STREAM = Path(__file__).resolve().parent / "bench_stream.py"
_MIB = 1024  # KiB per MiB


def _stream(kind: str, n: int, src: Path, *extra: str) -> Any:
    """One measurement of ``scripts/bench_stream.py`` in a process of its own, with ``src``
    first on the path (this checkout's, or the one given with ``--before``)."""
    env = {**os.environ, "PYTHONPATH": str(src), "OMP_NUM_THREADS": "2"}
    done = subprocess.run(
        [sys.executable, str(_STREAM), kind, str(n), *extra],
        capture_output=True,
        text=True,
        env=env,
        timeout=3600,
    )
    if done.returncode != 0:
        return {"error": done.stderr.strip().splitlines()[-1:] or ["failed"]}
    return json.loads(done.stdout.strip().splitlines()[-1])["result"]


def stream_figures(src: Path, large: bool, quick: bool, before: bool) -> dict[str, Any]:
    """The teacher pass at scale under one checkout (see the module docstring). The code
    before streaming holds N x C outputs several times over: at 1,281,167 samples it needs
    some 20-77 GiB, so ``before`` skips those sizes."""
    small = 5_000 if quick else 100_000
    sizes = [small] + ([IMAGENET] if large and not before and not quick else [])
    ranks = [2_000] if quick else [25_000, 100_000]
    figures: dict[str, Any] = {"src": str(src), "full_views1": {}, "topk10_views4": {}}
    for n in sizes:
        full = _stream("finish", n, src)
        if "error" not in full:
            (one,) = full
            ratios = [p / f for p, f in zip(one["plain_s"], one["finish_s"], strict=True)]
            one["throughput_ratio"] = statistics.median(ratios)
            pairs = zip(one.get("plain_cpu_s", []), one.get("finish_cpu_s", []), strict=True)
            cpu = [p / f for p, f in pairs]
            one["throughput_ratio_cpu"] = statistics.median(cpu) if cpu else None
            one["extra_peak_mib"] = max(one["extra_peak_kib_each"]) / _MIB
        figures["full_views1"][str(n)] = full
        compact = _stream("finish", n, src, "--views", "4", "--top-k", "10", "--once")
        if "error" not in compact:
            compact[0]["extra_peak_mib"] = max(compact[0]["extra_peak_kib_each"]) / _MIB
        figures["topk10_views4"][str(n)] = compact
    figures["two_ranks"] = {}
    for n in ranks:
        both = _stream("finish", n, src, "--world", "2", "--threads", "1", "--once")
        if "error" not in both:
            for rank in both:
                rank["extra_peak_mib"] = max(rank["extra_peak_kib_each"]) / _MIB
        figures["two_ranks"][str(n)] = both
    figures["store_write"] = {str(n): _stream("write", n, src) for n in sizes}
    for generators in ("torch",) if quick else ("all", "torch"):
        figures[f"replay_{generators}"] = _stream(
            "replay", 2_000 if quick else 20_000, src, "--threads", "1", "--generators", generators
        )
    return figures


def stream_rows(after: dict[str, Any], before: dict[str, Any] | None) -> list[dict[str, Any]]:
    """The table rows of the teacher pass at scale, each with its "before" figure."""
    return (
        _memory_rows(after, before)
        + _throughput_rows(after, before)
        + _replay_rows(after, before)
        + _write_rows(after, before)
    )


def _memory_rows(after: dict[str, Any], before: dict[str, Any] | None) -> list[dict[str, Any]]:
    rows = []

    def peak(figures: dict[str, Any] | None, key: str, n: str, rank: int = 0) -> float | None:
        found = (figures or {}).get(key, {}).get(n)
        if not found or "error" in found:
            return None
        return float(found[rank]["extra_peak_mib"])

    for key, label in (
        ("full_views1", "full store, views=1"),
        ("topk10_views4", "top_k=10, views=4"),
    ):
        for n in after[key]:
            rows.append(
                {
                    "figure": f"extra peak RSS of finish (MiB), {label}, N={int(n):,}",
                    "value": peak(after, key, n),
                    "before": peak(before, key, n),
                    "goal": "<= 512",
                }
            )
    for n in after["two_ranks"]:
        for rank in (0, 1):
            rows.append(
                {
                    "figure": f"extra peak RSS of finish (MiB), two ranks, rank {rank}, "
                    f"N={int(n):,}",
                    "value": peak(after, "two_ranks", n, rank),
                    "before": peak(before, "two_ranks", n, rank),
                    "goal": "<= 512",
                }
            )

    return rows


def _throughput_rows(after: dict[str, Any], before: dict[str, Any] | None) -> list[dict[str, Any]]:
    rows = []

    def ratio(figures: dict[str, Any] | None, n: str, key: str) -> float | None:
        found = (figures or {}).get("full_views1", {}).get(n)
        value = None if not found or "error" in found else found[0].get(key)
        return None if value is None else float(value)

    for n in after["full_views1"]:
        for key, clock in (("throughput_ratio", "wall"), ("throughput_ratio_cpu", "CPU")):
            rows.append(
                {
                    "figure": f"teacher pass samples/s / plain loop ({clock}), N={int(n):,}",
                    "value": ratio(after, n, key),
                    "before": ratio(before, n, key),
                    "goal": ">= 0.95",
                }
            )

    return rows


def _replay_rows(after: dict[str, Any], before: dict[str, Any] | None) -> list[dict[str, Any]]:
    rows = []

    def replay_ratio(figures: dict[str, Any] | None, name: str, key: str) -> float | None:
        found = (figures or {}).get(name)
        value = None if not found or "error" in found else found.get(key)
        return None if value is None else float(value)

    for name, data in (("replay_all", "torch+Python"), ("replay_torch", "torch only")):
        if name not in after:  # --quick measures torchvision's case alone
            continue
        for key, clock in (("ratio_median", "wall"), ("cpu_ratio_median", "CPU")):
            rows.append(
                {
                    "figure": f"replayed / plain pass per row, augmenting {data} ({clock})",
                    "value": replay_ratio(after, name, key),
                    "before": replay_ratio(before, name, key),
                    "goal": "<= 1.3",
                }
            )
    return rows


def _write_rows(after: dict[str, Any], before: dict[str, Any] | None) -> list[dict[str, Any]]:
    rows = []
    writes = after["store_write"]
    for n, found in writes.items():
        old = (before or {}).get("store_write", {}).get(n)
        rows.append(
            {
                "figure": f"store write, us per row, N={int(n):,}",
                "value": found.get("us_per_row"),
                "before": None if not old or "error" in old else old["us_per_row"],
                "goal": "report",
            }
        )
    if len(writes) > 1:
        first, last = list(writes.values())[0], list(writes.values())[-1]
        rows.append(
            {
                "figure": "store write per row, N=1,281,167 / N=100,000",
                "value": last["us_per_row"] / first["us_per_row"],
                "before": None,
                "goal": "<= 1.2",
            }
        )
    return rows


def main() -> int:
    parser = argparse.ArgumentParser(prog="scripts/bench", description=__doc__.split("\n")[0])
    parser.add_argument("--repeats", type=int, default=9, help="alternations per figure (>= 5)")
    parser.add_argument("--threads", type=int, default=2)
    parser.add_argument("--store-rows", type=int, default=1_280_000)
    parser.add_argument("--quick", action="store_true", help="tiny sizes, 2 repeats: a smoke run")
    parser.add_argument("--out", default="bench.json")
    parser.add_argument(
        "--only",
        choices=("all", "loops", "stream"),
        default="all",
        help="loops: the figures of the training and teacher loops; stream: the teacher pass at "
        "scale (memory, speed, writing, replay)",
    )
    parser.add_argument(
        "--large", action="store_true", help="the teacher pass at scale at N = 1,281,167 too"
    )
    parser.add_argument(
        "--before",
        type=Path,
        help="a checkout of filial (its src/ is used) to measure the teacher pass at scale "
        "against, side by side",
    )
    args = parser.parse_args()
    repeats = 2 if args.quick else max(5, args.repeats)
    if args.quick:
        ROOM_SIZES.update(train_size=256, heldout_size=100)
    rows = 4096 if args.quick else args.store_rows
    lineage_epochs = 2 if args.quick else 30
    torch.set_num_threads(args.threads)
    work = Path(tempfile.mkdtemp(prefix="filial-bench-"))
    started = time.perf_counter()
    figures: dict[str, Any] = {}
    table: list[dict[str, Any]] = []
    if args.only in ("all", "loops"):
        try:
            figures.update(loop_figures(args, repeats, rows, lineage_epochs, work))
        finally:
            shutil.rmtree(work, ignore_errors=True)
        table = loop_table(figures)
    stream_table: list[dict[str, Any]] = []
    if args.only in ("all", "stream"):
        here = Path(__file__).resolve().parents[1] / "src"
        figures["stream"] = stream_figures(here, args.large, args.quick, before=False)
        before = None
        if args.before is not None:
            before = stream_figures(args.before / "src", args.large, args.quick, before=True)
            figures["stream_before"] = before
        stream_table = stream_rows(figures["stream"], before)
    report = {
        "cores": os.cpu_count(),
        "threads": args.threads,
        "repeats": repeats,
        "quick": args.quick,
        "seconds": time.perf_counter() - started,
        "load_average": os.getloadavg(),
        "torch": torch.__version__,
        "table": table,
        "stream_table": stream_table,
        "figures": figures,
    }
    Path(args.out).write_text(json.dumps(report, indent=2) + "\n")
    if table:
        print(f"{'figure':<50} {'value':>8}  {'goal':<8} {'met':<4} spread (min-max)")
        for row in table:
            print(
                f"{row['figure']:<50} {row['value']:>8.3f}  {row['goal']:<8} "
                f"{'yes' if row['met'] else 'NO':<4} {row['spread']}"
            )
        sizes = ", ".join(
            f"C={c}: {v['full']} full, {v['top_k_10']} top-10"
            for c, v in figures["compact_store"].items()
            if c != "bytes_per_sample"
        )
        print(f"bytes per sample: {sizes}")
    if stream_table:
        print(f"\n{'the teacher pass at scale':<66} {'after':>9} {'before':>9}  goal")
        for row in stream_table:
            value = "-" if row["value"] is None else f"{row['value']:.3f}"
            old = "-" if row["before"] is None else f"{row['before']:.3f}"
            print(f"{row['figure']:<66} {value:>9} {old:>9}  {row['goal']}")
        if not args.large:
            print("(N = 1,281,167: scripts/bench --only stream --large)")
    load = ", ".join(f"{x:.2f}" for x in os.getloadavg())
    print(
        f"{os.cpu_count()} cores, {args.threads} threads, {repeats} repeats, load average "
        f"{load}; wrote {args.out}"
    )
    return 0


def loop_figures(
    args: argparse.Namespace, repeats: int, rows: int, lineage_epochs: int, work: Path
) -> dict[str, Any]:
    """The figures of the training and teacher loops, in one process."""
    room = digits_room()
    images, held_images = (
        (random_images(128, 1), random_images(64, 2))
        if args.quick
        else (random_images(1024, 1), random_images(256, 2))
    )
    return {
        "student_epoch_digits_mlp": student_overhead(
            MLP((256, 256)), room.train, room.heldout, 64, repeats, work / "mlp"
        ),
        "student_epoch_cnn_32x32": student_overhead(
            SmallCNN(), images, held_images, 64, repeats, work / "cnn"
        ),
        "teacher_pass": teacher_pass(repeats, work),
        "cache_versus_online": cache_versus_online(repeats, work / "online"),
        "cache_versus_online_cifar": cache_versus_online_cifar(
            repeats, work / "online_cifar", args.quick
        ),
        "store_gather": store_gather(rows, repeats, work),
        "lineage_overhead": lineage_overhead(lineage_epochs, work),
        "compact_store": compact_store(work),
        "early_stopping": early_stopping_cost(2 if args.quick else 10, repeats, work),
        "pool_student_epoch": pool_student_overhead(repeats, work, args.quick),
    }


def loop_table(figures: dict[str, Any]) -> list[dict[str, Any]]:
    """The goal rows of the loop figures."""
    goals = [
        (
            "generation-0 epoch / plain epoch, digits MLP",
            figures["student_epoch_digits_mlp"]["generation0"],
            "ratio_median",
            "<=",
            1.02,
        ),
        (
            "student epoch / plain epoch, digits MLP",
            figures["student_epoch_digits_mlp"]["student"],
            "ratio_median",
            "<=",
            1.02,
        ),
        (
            "generation-0 epoch / plain epoch, CNN 32x32",
            figures["student_epoch_cnn_32x32"]["generation0"],
            "ratio_median",
            "<=",
            1.02,
        ),
        (
            "student epoch / plain epoch, CNN 32x32",
            figures["student_epoch_cnn_32x32"]["student"],
            "ratio_median",
            "<=",
            1.02,
        ),
        (
            "teacher pass samples/s / plain no_grad samples/s",
            figures["teacher_pass"],
            "throughput_ratio_median",
            ">=",
            0.95,
        ),
        (
            "cached student epoch / online-teacher epoch",
            figures["cache_versus_online"],
            "ratio_median",
            "<",
            0.8,
        ),
        (
            "cached / online-teacher epoch, CIFAR ResNet, FakeData",
            figures["cache_versus_online_cifar"],
            "ratio_median",
            "<",
            0.8,
        ),
        (
            "store gather, memory-mapped / in-memory",
            figures["store_gather"],
            "ratio_median",
            "<=",
            3.0,
        ),
        (
            "store gather, ms per 256-row batch",
            figures["store_gather"],
            "mapped_ms_per_batch",
            "<",
            1.0,
        ),
        (
            "bytes per sample, top_k=10 at C=1000",
            figures["compact_store"],
            "bytes_per_sample",
            "<=",
            60,
        ),
        (
            "early-stopped baseline / matched baseline, digits MLP",
            figures["early_stopping"],
            "ratio_median",
            "<=",
            1.15,
        ),
        (
            "student epoch with a pool / plain loop, digits MLP",
            figures["pool_student_epoch"],
            "ratio_median",
            "<=",
            1.05,
        ),
        (
            "lineage wall / (epochs + teacher passes)",
            figures["lineage_overhead"],
            "ratio",
            "<=",
            1.05,
        ),
    ]
    table = []
    for name, figure, key, op, goal in goals:
        value = float(figure[key])
        met = {"<=": value <= goal, ">=": value >= goal, "<": value < goal}[op]
        spread = ""
        if key == "ratio_median":
            spread = f"{figure['ratio_min']:.3f}-{figure['ratio_max']:.3f}"
        elif key == "throughput_ratio_median":
            spread = f"{figure['throughput_ratio_min']:.3f}-{figure['throughput_ratio_max']:.3f}"
        table.append(
            {"figure": name, "value": value, "goal": f"{op} {goal}", "met": met, "spread": spread}
        )
    return table


if __name__ == "__main__":
    raise SystemExit(main())

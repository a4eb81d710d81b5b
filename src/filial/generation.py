"""One generation: a fresh student, its wrapped loader, its loss, and ``finish``.

A :class:`Generation` is handed out by :class:`~filial.lineage.Lineage`; the user trains
``gen.model`` on ``gen.loader`` with ``gen.loss`` and calls ``gen.finish(model)``. ``finish``
evaluates the student (held-out, training set against the original labels, test), runs the
teacher pass over the training set in index order, and writes, each atomically and in this order,
the checkpoint, the held-out outputs and the target store. It then hands the record to the
lineage, which adds what needs earlier generations (ensemble, agreement) and decides. This module
knows nothing about the loop.
"""

from __future__ import annotations

import time
from collections.abc import Callable
from dataclasses import dataclass
from pathlib import Path
from typing import Any

import numpy as np
import torch
import torch.nn.functional as F
from torch import nn
from torch.utils.data import DataLoader, DistributedSampler

from . import distributed
from ._faults import armed, fault_point
from ._io import atomic_write
from .checkpoint import save_checkpoint, unwrap
from .data import (
    Replay,
    code_count,
    derive_seed,
    preserved_rng,
    sequential_loader,
    training_loader,
)
from .losses import StudentLoss
from .metrics import Metric
from .store import TargetStore

HELDOUT_FILE = "heldout.npy"
CHECKPOINT_FILE = "student.pt"


@dataclass(frozen=True)
class Setup:
    """What every generation of one lineage shares (built once by the lineage)."""

    run_dir: Path
    train_loader: DataLoader
    heldout_loader: DataLoader
    test_loader: DataLoader | None
    loss: StudentLoss
    metric: Metric  # resolved once by the lineage; returns a Python float
    store_dtype: str
    views: int
    fingerprint: str
    seed: int
    write_targets: bool = True  # False for a model nobody distils from (the matched baseline)
    top_k: int | None = None  # keep only the k largest outputs per sample (ce only)
    replay: Replay | None = None  # the training data augment: fetch (sample, view) under seeds


@dataclass
class Predictions:
    """A model's outputs on a whole loader, in dataset index order."""

    outputs: torch.Tensor  # (N, C) float32 on the CPU
    labels: torch.Tensor  # (N, ...) on the CPU
    indices: torch.Tensor | None = None  # a shard's dataset index per row (None: all, in order)


def move_to(value: Any, device: torch.device) -> Any:
    """Move tensors inside (nested tuples, lists, dicts of) ``value`` to ``device``."""
    if isinstance(value, torch.Tensor):
        return value.to(device, non_blocking=True) if value.device != device else value
    if isinstance(value, (list, tuple)):
        moved = [move_to(v, device) for v in value]
        return type(value)(moved) if not hasattr(value, "_fields") else type(value)(*moved)
    if isinstance(value, dict):
        return {k: move_to(v, device) for k, v in value.items()}
    return value


def model_device(model: nn.Module) -> torch.device:
    for tensor in model.parameters():
        return tensor.device
    for tensor in model.buffers():
        return tensor.device
    return torch.device("cpu")


def predict(
    model: nn.Module,
    loader: DataLoader,
    seed: int,
    fault: str | None = None,
    replay: Replay | None = None,
    sampler: DistributedSampler | None = None,
) -> Predictions:
    """Outputs of ``model`` (in eval mode, restored afterwards) over ``loader``'s whole dataset.

    The batches come in index order, so each one fills the next rows of a buffer kept on the
    model's device; it is copied to the CPU once, at the end (no synchronisation per batch).
    With a ``replay`` the rows are the (sample, view) pairs in code order, ``i * views + v``.
    With ``sampler`` (a rank's shard of those codes) the rows follow the sampler and
    ``indices`` names them.
    """
    module = unwrap(model)
    device = model_device(module)
    size = code_count(loader.dataset, replay) if sampler is None else len(sampler)
    order = None if sampler is None else torch.empty(size, dtype=torch.int64)
    outputs: torch.Tensor | None = None
    labels: torch.Tensor | None = None
    filled = 0
    was_training = module.training
    module.eval()
    try:
        # A dataset with random augmentation draws from the global generators in this process
        # when the loader has no workers; the evaluation must not move the user's streams.
        with preserved_rng(), torch.inference_mode():
            for indices, inputs, batch_labels in sequential_loader(loader, seed, replay, sampler):
                if fault is not None:
                    fault_point("teacher", fault)
                out = module(move_to(inputs, device))
                if not isinstance(out, torch.Tensor) or out.ndim != 2 or len(out) != len(indices):
                    shape = tuple(out.shape) if isinstance(out, torch.Tensor) else type(out)
                    raise ValueError(
                        "the model must return a tensor of shape (batch, outputs) with one row "
                        f"per sample, but returned {shape} for a batch of {len(indices)}"
                    )
                batch_labels = torch.as_tensor(batch_labels)
                if outputs is None or labels is None:
                    outputs = torch.empty(
                        (size, out.shape[1]), dtype=torch.float32, device=out.device
                    )
                    labels = torch.empty((size, *batch_labels.shape[1:]), dtype=batch_labels.dtype)
                elif out.shape[1] != outputs.shape[1]:
                    raise ValueError(
                        f"the model's output width changed within one pass "
                        f"({outputs.shape[1]} then {out.shape[1]})"
                    )
                if order is None and int(indices[0]) != filled:
                    raise RuntimeError(
                        f"evaluation batch starts at {int(indices[0])}, not {filled}"
                    )
                end = filled + len(indices)
                if order is not None:
                    order[filled:end] = torch.as_tensor(indices, dtype=torch.int64)
                outputs[filled:end] = out
                labels[filled:end] = batch_labels
                filled = end
    finally:
        module.train(was_training)
    if outputs is None or labels is None or filled != size:
        raise RuntimeError(f"the evaluation pass covered {filled} of {size} samples")
    return Predictions(outputs.cpu(), labels, order)


def evaluate(
    model: nn.Module,
    loader: DataLoader,
    seed: int,
    fault: str | None = None,
    replay: Replay | None = None,
) -> Predictions | None:
    """:func:`predict` over the whole dataset; under a process group each rank predicts its
    shard and rank 0 receives the whole, checked index by index (None on the other ranks)."""
    if not distributed.is_distributed():
        return predict(model, loader, seed, fault=fault, replay=replay)
    size = code_count(loader.dataset, replay)
    sampler = distributed.shard_sampler(range(size))  # a share of the codes i * views + v
    part = predict(model, loader, seed, fault=fault, replay=replay, sampler=sampler)
    assert part.indices is not None  # a sampler was given
    padding = distributed.padding_rows(sampler)
    whole = distributed.gather_indexed(
        part.indices, size, part.outputs, part.labels, padding=padding
    )
    return None if whole is None else Predictions(whole[0], whole[1])


def probe_outputs(model: nn.Module, inputs: Any) -> torch.Tensor:
    """The model's outputs on a few probe inputs: eval mode (restored), no gradients, and the
    caller's random streams untouched (dropout would draw from them)."""
    module = unwrap(model)
    was_training = module.training
    module.eval()
    try:
        with preserved_rng(), torch.inference_mode():
            return module(move_to(inputs, model_device(module)))
    finally:
        module.train(was_training)


def _entropy(outputs: torch.Tensor, temperature: float) -> float:
    logp = F.log_softmax(outputs / temperature, dim=1)
    return float(-(logp.exp() * logp).sum(dim=1).mean())


def _finite_module(model: nn.Module) -> bool:
    checks = [torch.isfinite(p).all() for p in unwrap(model).parameters()]
    return bool(torch.stack(checks).all()) if checks else True  # one device sync


def training_pass(
    model: nn.Module, setup: Setup, seed: int, fault: str | None = None
) -> tuple[Predictions, torch.Tensor] | None:
    """The teacher pass over the training set: its outputs ``(N, views, C)``, and the
    predictions of view 0 (for the training-set figures of the record). Under a process group
    the ranks share it and only rank 0 gets the result (None elsewhere)."""
    replay = setup.replay
    if replay is not None and not setup.write_targets:
        replay = Replay(replay.seed, 1)  # nobody reads the views: view 0 is enough
    train = evaluate(model, setup.train_loader, seed, fault=fault, replay=replay)
    if train is None:
        return None
    views = replay.views if replay is not None else 1
    outputs = train.outputs.view(-1, views, train.outputs.shape[1])
    return Predictions(outputs[:, 0], train.labels[::views]), outputs


def write_targets(
    setup: Setup, directory: Path, outputs: torch.Tensor, teacher_sha256: str
) -> TargetStore:
    """Write a teacher's training-set outputs ``(N, views, C)`` as the store in ``directory``."""
    rows = outputs.numpy()
    if rows.ndim != 3 or rows.shape[1] != setup.views:
        raise ValueError(
            f"the teacher pass gave outputs of shape {tuple(rows.shape)}, but the store needs "
            f"(N, {setup.views}, C)"
        )
    return TargetStore.write(
        directory,
        rows,
        dtype=setup.store_dtype,
        fingerprint=setup.fingerprint,
        teacher_sha256=teacher_sha256,
        top_k=setup.top_k,
    )


class OnlineTeacherLoader:
    """The training loader with each batch's targets from running the teacher on it.

    Exact for any augmentation (the teacher sees the very inputs the student sees), at the cost
    of a teacher forward pass per step. The teacher follows the student to its device at the
    start of every epoch and runs in eval mode without gradients.
    """

    def __init__(self, loader: DataLoader, teacher: nn.Module, student: nn.Module) -> None:
        self.loader = loader
        self.teacher = teacher.eval()
        self.student = student

    def __len__(self) -> int:
        return len(self.loader)

    def __getattr__(self, name: str) -> Any:
        # Everything else (``sampler.set_epoch``, ``dataset``, ``batch_size``) is the loader's.
        if name == "loader":
            raise AttributeError(name)
        return getattr(self.loader, name)

    def __iter__(self):
        device = model_device(self.student)
        teacher = self.teacher.to(device)
        for inputs, labels, _ in self.loader:
            with torch.no_grad():
                targets = teacher(move_to(inputs, device)).float()
            yield inputs, labels, targets


class Generation:
    """One generation of a lineage. ``index`` 0 learns from labels; later ones from a teacher.

    Attributes: ``index``, ``teacher`` (the teacher's generation index, or None), ``model`` (a
    freshly initialised student from ``model_fn``), ``store`` (the teacher's targets, or None).
    """

    def __init__(
        self,
        index: int,
        model: nn.Module,
        setup: Setup,
        teacher: int | None,
        store: TargetStore | None,
        # Called with None, None on ranks other than 0 (which wait for rank 0's record).
        on_finish: Callable[
            [Generation, dict[str, Any] | None, Predictions | None], dict[str, Any]
        ],
        teacher_model: nn.Module | None = None,
    ) -> None:
        self.index = index
        self.model = model
        self.teacher = teacher
        self.store = store
        self.teacher_model = teacher_model  # online mode: the teacher runs on every batch
        self.history: list[dict[str, float]] = []
        self.record: dict[str, Any] | None = None
        self.decided: tuple[int, int] | None = None  # ranks other than 0: rank 0's (stop, count)
        self._setup = setup
        self._on_finish = on_finish
        self._loader: DataLoader | None = None
        self._started = time.perf_counter()

    @property
    def directory(self) -> Path:
        return self._setup.run_dir / f"gen{self.index}"

    @property
    def finished(self) -> bool:
        return self.record is not None

    @property
    def loader(self) -> DataLoader | OnlineTeacherLoader:
        """The user's training loader, rebuilt to yield ``(inputs, labels, targets)``."""
        if self._loader is None:
            if self.teacher_model is not None:
                self._loader = OnlineTeacherLoader(
                    training_loader(self._setup.train_loader, None), self.teacher_model, self.model
                )
            else:
                # A student reads cached targets, so its samples are replayed; generation 0
                # (no store) trains on the user's own random augmentation.
                replay = self._setup.replay if self.store is not None else None
                choice = derive_seed(self._setup.seed, self.index, 4)
                self._loader = training_loader(
                    self._setup.train_loader, self.store, replay, choice_seed=choice
                )
        return self._loader

    def loss(
        self, outputs: torch.Tensor, labels: torch.Tensor, targets: torch.Tensor | None
    ) -> torch.Tensor:
        """The generation's training loss; ``targets`` is None in generation 0."""
        return self._setup.loss(outputs, labels, targets)

    def log_epoch(self, epoch: int, **scalars: float) -> None:
        """Record per-epoch scalars (``loss=...``); they go into the generation's record."""
        self.history.append({"epoch": int(epoch), **{k: float(v) for k, v in scalars.items()}})

    def finish(self, model: nn.Module | None = None) -> dict[str, Any]:
        """Evaluate, cache targets, checkpoint, and let the lineage decide; returns the record."""
        if self.finished:
            raise RuntimeError(f"generation {self.index} is already finished")
        model = self.model if model is None else model
        if not isinstance(model, nn.Module):
            raise TypeError(f"finish() needs the trained nn.Module, but got {type(model).__name__}")
        setup = self._setup
        seed = derive_seed(setup.seed, self.index, 1)
        fault = f"gen{self.index}" if armed("teacher") else None
        distributed.align_replicas(unwrap(model))
        passes = training_pass(model, setup, seed, fault=fault)
        heldout = evaluate(model, setup.heldout_loader, seed)
        test = evaluate(model, setup.test_loader, seed) if setup.test_loader is not None else None
        if passes is None or heldout is None:
            # Note: several processes. Only rank 0 holds the whole passes: it scores, writes and
            # decides (in on_finish), then sends (ok, stop, finished generations); this rank
            # waits for that word and takes the lineage's decision, without a record. A failure
            # on rank 0 is sent too, so that no rank waits for a decision that never comes.
            ok, stop, finished = distributed.broadcast_ints(None, 3)
            if not ok:
                raise distributed.RankZeroFailed(
                    f"rank 0 failed while finishing generation {self.index} (its output has the "
                    f"error), so rank {distributed.rank()} stops too"
                )
            self.decided = (stop, finished)
            self.record = self._on_finish(self, None, None)
            return self.record
        try:
            self.record = self._finish_here(model, passes, heldout, test)
        except BaseException:
            if distributed.is_distributed():
                distributed.broadcast_ints([0, 0, 0], 3)
            raise
        if distributed.is_distributed():
            stop = int(bool(self.record.get("stop")))
            distributed.broadcast_ints([1, stop, self.index + 1], 3)
        return self.record

    def _finish_here(
        self,
        model: nn.Module,
        passes: tuple[Predictions, torch.Tensor],
        heldout: Predictions,
        test: Predictions | None,
    ) -> dict[str, Any]:
        """Score, write and hand the record to the lineage (in the one process that writes)."""
        setup = self._setup
        train, train_outputs = passes
        metric = setup.metric
        diverged = not (
            _finite_module(model)
            and bool(torch.isfinite(train_outputs).all())
            and bool(torch.isfinite(heldout.outputs).all())
        )
        record: dict[str, Any] = {
            "generation": self.index,
            "teacher": self.teacher,
            # What the generation learned from: the labels, the cache, or a teacher run online.
            "mode": "labels"
            if self.teacher is None
            else ("online" if self.teacher_model is not None else "cached"),
            "heldout": None if diverged else metric(heldout.outputs, heldout.labels),
            "test": None,
            "train": None if diverged else metric(train.outputs, train.labels),
            "ensemble": None,
            "agreement": None,
            "diverged": diverged,
        }
        if test is not None and not diverged:
            record["test"] = metric(test.outputs, test.labels)
        if not diverged:
            record.update(self._target_statistics(train))
        self.directory.mkdir(parents=True, exist_ok=True)
        teacher_sha = save_checkpoint(model, self.directory / CHECKPOINT_FILE)
        atomic_write(
            self.directory / HELDOUT_FILE,
            lambda handle: np.save(handle, heldout.outputs.numpy(), allow_pickle=False),
        )
        if diverged:
            # An earlier attempt at this generation may have left a store; it is never a teacher.
            for name in (TargetStore.MANIFEST, TargetStore.ARRAY, TargetStore.INDEX):
                (self.directory / name).unlink(missing_ok=True)
        elif setup.write_targets:
            write_targets(setup, self.directory, train_outputs, teacher_sha)
        record["checkpoint"] = f"gen{self.index}/{CHECKPOINT_FILE}"
        record["checkpoint_sha256"] = teacher_sha
        record["epochs"] = list(self.history)
        record["seconds"] = time.perf_counter() - self._started
        return self._on_finish(self, record, heldout)

    def _target_statistics(self, train: Predictions) -> dict[str, Any]:
        stats: dict[str, Any] = {}
        outputs, labels = train.outputs, train.labels
        if self._setup.loss.kind == "ce":
            stats["target_entropy"] = _entropy(outputs, self._setup.loss.temperature)
        else:
            stats["output_norm"] = float(outputs.norm(dim=1).mean())
        if outputs.shape[1] > 1 and not labels.is_floating_point():
            predicted = torch.bincount(outputs.argmax(dim=1), minlength=outputs.shape[1])
            stats["prediction_share"] = float(predicted.max()) / outputs.shape[0]
            stats["label_share"] = float(torch.bincount(labels.long().flatten()).max()) / len(
                labels
            )
        return stats

    def __repr__(self) -> str:
        return f"Generation(index={self.index}, teacher={self.teacher}, finished={self.finished})"

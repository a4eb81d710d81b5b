"""Where the students' targets come from: the teacher pass, its store, the online teacher.

* :func:`training_pass` runs a finished generation over the training set in code order (every
  sample, and every replayed view), and :func:`write_targets` writes those outputs as the
  :class:`~filial.store.TargetStore` the next generation reads; :func:`target_statistics` gives
  the figures of the record that come from that pass (entropy or norm, class shares).
* :class:`TeacherStores` opens the store of a lineage's teacher when a student starts: verified
  against its manifest, and recomputed from the teacher's checkpoint when it is damaged.
* :class:`OnlineTeacherLoader` is the training loader with the teacher run on every batch
  (``teacher_mode="online"``), for augmentation no cache can replay.
"""

from __future__ import annotations

import logging
from collections.abc import Callable, Iterator
from dataclasses import dataclass
from typing import Any, NamedTuple

import torch
import torch.nn.functional as F
from torch import nn
from torch.utils.data import DataLoader

from . import distributed
from .checkpoint import load_model
from .data import Replay
from .evaluation import Predictions, evaluate, model_device, move_to
from .records import GenerationRecord
from .rundir import RunDirectory
from .seeding import Stream, stream_seed
from .store import StoreError, TargetStore

log = logging.getLogger("filial")


@dataclass(frozen=True)
class StoreSpec:
    """How a lineage stores its targets."""

    dtype: str
    views: int
    top_k: int | None
    fingerprint: str  # the training data's: targets of other data are never read


class TeacherPass(NamedTuple):
    """A teacher pass over the training set."""

    view0: Predictions  # outputs of view 0 of every sample, with the training labels
    outputs: torch.Tensor  # (N, views, C): every (sample, view), for the store


def training_pass(
    model: nn.Module,
    train_loader: DataLoader,
    replay: Replay | None,
    seed: int,
    *,
    all_views: bool = True,
    fault: str | None = None,
) -> TeacherPass | None:
    """The teacher pass over the training set. ``all_views=False`` scores view 0 only (for a
    model nobody distils from). Under a process group the ranks share it and only rank 0 gets
    the result (None elsewhere)."""
    if replay is not None and not all_views:
        replay = Replay(replay.seed, 1)  # nobody reads the views: view 0 is enough
    train = evaluate(model, train_loader, seed, fault=fault, replay=replay)
    if train is None:
        return None
    views = replay.views if replay is not None else 1
    outputs = train.outputs.view(-1, views, train.outputs.shape[1])
    return TeacherPass(Predictions(outputs[:, 0], train.labels[::views]), outputs)


def write_targets(
    spec: StoreSpec, directory: Any, outputs: torch.Tensor, teacher_sha256: str
) -> TargetStore:
    """Write a teacher's training-set outputs ``(N, views, C)`` as the store in ``directory``."""
    rows = outputs.numpy()
    if rows.ndim != 3 or rows.shape[1] != spec.views:
        raise ValueError(
            f"the teacher pass gave outputs of shape {tuple(rows.shape)}, but the store needs "
            f"(N, {spec.views}, C)"
        )
    return TargetStore.write(
        directory,
        rows,
        dtype=spec.dtype,
        fingerprint=spec.fingerprint,
        teacher_sha256=teacher_sha256,
        top_k=spec.top_k,
    )


def target_statistics(kind: str, temperature: float, train: Predictions) -> dict[str, float]:
    """The record's figures of a teacher pass: the targets' mean entropy at ``temperature``
    (ce) or mean output norm (l2), and the largest shares of one class among the predictions
    and among the labels (the stop rule's collapse test compares the two)."""
    stats: dict[str, float] = {}
    outputs, labels = train.outputs, train.labels
    if kind == "ce":
        logp = F.log_softmax(outputs / temperature, dim=1)
        stats["target_entropy"] = float(-(logp.exp() * logp).sum(dim=1).mean())
    else:
        stats["output_norm"] = float(outputs.norm(dim=1).mean())
    if outputs.shape[1] > 1 and not labels.is_floating_point():
        predicted = torch.bincount(outputs.argmax(dim=1), minlength=outputs.shape[1])
        stats["prediction_share"] = float(predicted.max()) / outputs.shape[0]
        stats["label_share"] = float(torch.bincount(labels.long().flatten()).max()) / len(labels)
    return stats


class TeacherStores:
    """Opens the store of a finished generation for the student that learns from it."""

    def __init__(
        self,
        run: RunDirectory,
        model_fn: Callable[[], nn.Module],
        train_loader: DataLoader,
        replay: Replay | None,
        spec: StoreSpec,
        seed: int,
    ) -> None:
        self.run = run
        self.model_fn = model_fn
        self.train_loader = train_loader
        self.replay = replay
        self.spec = spec
        self.seed = seed
        self.fresh: TargetStore | None = None  # written by this process: no need to verify

    def open(self, teacher: GenerationRecord) -> TargetStore:
        """The teacher's store, verified (rebuilt from its checkpoint if damaged)."""
        if not distributed.is_distributed():
            store = self._checked(teacher)
            if store is None:
                store = self._rebuilt(teacher)
            assert store is not None  # one process: the whole pass is here
            return store
        # Note: several processes. Rank 0 verifies the store while the others wait; a damaged
        # one is rebuilt by all ranks together (each scores its shard, as in every teacher
        # pass), so that no rank idles through a whole pass inside a collective's timeout; rank
        # 0 writes it, and then the other ranks open the store it vouched for.
        what = f"checking generation {teacher['generation']}'s targets"
        store = distributed.on_rank_zero(lambda: self._checked(teacher), what)
        (rebuild,) = distributed.broadcast_ints(
            [int(store is None)] if distributed.is_main() else None, 1
        )
        if rebuild:
            store = self._rebuilt(teacher)
        if store is None:
            store = self._shared(teacher)
        return store

    def _shared(self, teacher: GenerationRecord) -> TargetStore:
        """A rank other than 0: the store rank 0 has vouched for, which it must see."""
        store = TargetStore(self.run.generation(teacher["generation"]))
        if not store.exists() or store.manifest["teacher_sha256"] != teacher.get(
            "checkpoint_sha256"
        ):
            raise StoreError(
                f"rank {distributed.rank()} finds no targets of generation "
                f"{teacher['generation']}'s checkpoint in {store.directory}, which rank 0 has "
                "written: every rank must see the same run directory (one machine, or a file "
                "system shared by the machines)"
            )
        return store

    def _checked(self, teacher: GenerationRecord) -> TargetStore | None:
        """The teacher's targets if they verify; None if they are missing or damaged and can be
        recomputed from its checkpoint. Targets of other training data raise."""
        directory = self.run.generation(teacher["generation"])
        if self.fresh is not None and self.fresh.directory == directory:
            return self.fresh
        store = TargetStore(directory)
        expected = self.spec.fingerprint
        try:
            store.verify(fingerprint=expected)
            if store.manifest["teacher_sha256"] != teacher.get("checkpoint_sha256"):
                raise StoreError(f"the targets in {directory} were not made by its checkpoint")
            return store
        except StoreError as exc:
            if store.exists() and store.manifest.get("fingerprint") != expected:
                raise  # other training data: recomputing would hide the user's mistake
            log.warning(
                "%s; recomputing generation %d's targets from its checkpoint",
                exc,
                teacher["generation"],
            )
        return None

    def _rebuilt(self, teacher: GenerationRecord) -> TargetStore | None:
        """Recompute the teacher's targets from its checkpoint and write them; under a process
        group every rank takes part and rank 0 writes (None on the other ranks)."""
        index = teacher["generation"]
        model = load_model(
            self.model_fn, self.run.recorded(teacher["checkpoint"]), teacher["checkpoint_sha256"]
        )
        seed = stream_seed(self.seed, Stream.PASSES, index)
        passed = training_pass(model, self.train_loader, self.replay, seed)

        def write() -> TargetStore:
            assert passed is not None  # rank 0 (or one process) holds the whole pass
            directory = self.run.generation(index)
            return write_targets(self.spec, directory, passed.outputs, teacher["checkpoint_sha256"])

        return distributed.on_rank_zero(write, f"writing generation {index}'s recomputed targets")


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

    def __iter__(self) -> Iterator[tuple[Any, Any, torch.Tensor]]:
        device = model_device(self.student)
        teacher = self.teacher.to(device)
        for inputs, labels, _ in self.loader:
            with torch.no_grad():
                targets = teacher(move_to(inputs, device)).float()
            yield inputs, labels, targets

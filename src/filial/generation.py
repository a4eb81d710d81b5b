"""One generation: a fresh student, its wrapped loader, its loss, and ``finish``.

A :class:`Generation` is handed out by :class:`~filial.lineage.Lineage`; the user trains
``gen.model`` on ``gen.loader`` with ``gen.loss`` and calls ``gen.finish(model)``. ``finish``
runs the teacher pass over the training set in index order (streamed into the target store's
temporary files, with the record's training-set figures summed on the way), evaluates the
student (held-out, test), and then hands over a function that scores the passes and writes,
each atomically and in this order, the checkpoint, the held-out outputs and the target store
(published: renamed into place, manifest last), returning what it measured (:class:`Measured`).
The lineage's ``conclude`` runs that function on the rank that writes, adds what needs earlier
generations (ensemble, agreement), decides and records. Nothing here takes part in the
decision or knows other generations.
"""

from __future__ import annotations

import functools
import time
from collections.abc import Callable, Iterator
from dataclasses import dataclass
from typing import Any

import numpy as np
import torch
from torch import nn
from torch.utils.data import DataLoader

from . import distributed
from ._faults import armed
from ._io import atomic_write
from .checkpoint import save_checkpoint, unwrap
from .data import Replay, training_loader
from .evaluation import Predictions, evaluate, finite_module
from .losses import StudentLoss
from .metrics import Metric, summed_form
from .observers import Observer
from .pool import PoolData, PoolLoss, PoolPass, PoolTeacher, conclude, mixed_loader, pool_pass
from .records import EpochEntry, GenerationRecord, mode_of
from .rundir import RunDirectory
from .seeding import Stream, stream_seed
from .spectral import SpectralView
from .store import TargetStore
from .teacher import FigureSpec, OnlineTeacherLoader, StoreSpec, TeacherPass, training_pass


@dataclass(frozen=True)
class GenerationInputs:
    """What every generation of one lineage works with (built once by the lineage)."""

    run: RunDirectory
    train_loader: DataLoader
    heldout_loader: DataLoader
    test_loader: DataLoader | None
    loss: StudentLoss
    metric: Metric  # resolved once by the lineage; returns a Python float
    seed: int
    store: StoreSpec
    write_targets: bool = True  # False for a model nobody distils from (a baseline)
    replay: Replay | None = None  # the training data augment: fetch (sample, view) under seeds
    # Refuses a finished model that is not what model_fn builds (models.ModelChecks.finished).
    check_finished: Callable[[nn.Module, int], None] | None = None
    pool: PoolData | None = None  # an unlabelled pool (filial.pool), labelled by every teacher
    # The spectral view (filial.spectral): its consumer joins the teacher pass; None: no view.
    spectral: SpectralView | None = None


@dataclass
class Measured:
    """What a generation's finish measured and wrote, on the rank that writes."""

    record: GenerationRecord  # ensemble and agreement still None: they need other generations
    heldout: Predictions


# The lineage's side of finish: given the generation and a function that scores and writes it
# (None on ranks other than 0, which do not write), it returns the generation's final record.
Conclude = Callable[["Generation", Callable[[], Measured] | None], GenerationRecord]


class Passes:
    """The passes over ``gen.loader`` and the losses ``gen.loss`` returned in them.

    Hook mode's epochs are the user's own loop, so filial counts them itself: every pass is an
    epoch (``passes``, ``batches`` go into the record), and a pass's mean loss becomes its epoch
    entry unless the user logged that epoch with ``gen.log_epoch`` (whose figures win). The
    losses are kept as detached tensors and summed once per pass: no device synchronisation and
    no extra kernel per batch.
    """

    def __init__(self) -> None:
        self.count = 0  # passes begun
        self.batches = 0  # batches yielded, over all passes
        self.losses: list[torch.Tensor] = []  # of the pass under way

    def begin(self, history: list[EpochEntry]) -> None:
        self.close(history)
        self.count += 1

    def close(self, history: list[EpochEntry]) -> None:
        """End the pass under way: its mean loss as epoch ``count - 1``, unless logged."""
        if self.count == 0 or not self.losses:
            self.losses = []
            return
        epoch = self.count - 1
        mean = float(torch.stack([loss.float() for loss in self.losses]).mean())
        self.losses = []
        if not any(entry.get("epoch") == epoch for entry in history):
            history.append({"epoch": epoch, "loss": mean})


class CountedLoader:
    """``gen.loader``: the rebuilt training loader, counting its passes and batches.

    Everything else (``len``, ``dataset``, ``sampler``, ``batch_size``) is the loader's.
    """

    def __init__(self, loader: Any, passes: Passes, history: list[EpochEntry]) -> None:
        self.loader = loader
        self.passes = passes
        self.history = history

    def __len__(self) -> int:
        return len(self.loader)

    def __getattr__(self, name: str) -> Any:
        if name in ("loader", "passes", "history"):
            raise AttributeError(name)
        return getattr(self.loader, name)

    def __iter__(self) -> Iterator[Any]:
        passes = self.passes
        passes.begin(self.history)
        for batch in self.loader:
            passes.batches += 1
            yield batch


class Generation:
    """One generation of a lineage. ``index`` 0 learns from labels; later ones from a teacher.

    Attributes: ``index``, ``teacher`` (the teacher's generation index, or None), ``model`` (a
    freshly initialised student from ``model_fn``), ``store`` (the teacher's targets, or None),
    ``history`` (the epochs logged so far), ``record`` (once finished).
    """

    def __init__(
        self,
        index: int,
        model: nn.Module,
        inputs: GenerationInputs,
        conclude: Conclude,
        *,
        teacher: int | None = None,
        store: TargetStore | None = None,
        online_teacher: nn.Module | None = None,
        observer: Observer | None = None,
        pool_teacher: PoolTeacher | None = None,
    ) -> None:
        self.index = index
        self.pool_teacher = pool_teacher  # the teacher's pool targets and admitted samples
        self.model = model
        self.teacher = teacher
        self.store = store
        self.online_teacher = online_teacher  # teacher_mode="online": runs on every batch
        self.history: list[EpochEntry] = []
        self.record: GenerationRecord | None = None
        self._inputs = inputs
        self._conclude = conclude
        self._observer = observer or Observer()
        self._loader: CountedLoader | None = None
        self._passes = Passes()
        self._started = time.perf_counter()
        pool = inputs.pool
        self._loss: Any = inputs.loss if pool is None else PoolLoss(inputs.loss, pool.admission)

    @property
    def directory(self) -> Any:
        return self._inputs.run.generation(self.index)

    @property
    def finished(self) -> bool:
        return self.record is not None

    @property
    def loader(self) -> CountedLoader:
        """The user's training loader, rebuilt to yield ``(inputs, labels, targets)``."""
        if self._loader is None:
            inputs = self._inputs
            wrapped: DataLoader | OnlineTeacherLoader
            if self.online_teacher is not None:
                plain = training_loader(inputs.train_loader, None)
                wrapped = OnlineTeacherLoader(plain, self.online_teacher, self.model)
            else:
                # A student reads cached targets, so its samples are replayed; generation 0
                # (no store) trains on the user's own random augmentation.
                replay = inputs.replay if self.store is not None else None
                choice = stream_seed(inputs.seed, Stream.VIEWS, self.index)
                if self.pool_teacher is not None and inputs.pool is not None:
                    assert self.store is not None  # a pool teacher is a cached teacher
                    wrapped = mixed_loader(
                        inputs.train_loader, inputs.pool, self.pool_teacher, self.store, replay,
                        choice,
                    )
                else:
                    wrapped = training_loader(
                        inputs.train_loader, self.store, replay, choice_seed=choice
                    )
            self._loader = CountedLoader(wrapped, self._passes, self.history)
        return self._loader

    def loss(
        self, outputs: torch.Tensor, labels: torch.Tensor, targets: torch.Tensor | None
    ) -> torch.Tensor:
        """The generation's training loss; ``targets`` is None in generation 0. Each value is
        also kept (detached) for the pass's mean loss in the record. With an unlabelled pool,
        rows labelled ``filial.pool.NO_LABEL`` (-1) are pool rows (``filial.pool.PoolLoss``)."""
        loss = self._loss(outputs, labels, targets)
        self._passes.losses.append(loss.detach())
        return loss

    def log_epoch(self, epoch: int, **scalars: float) -> None:
        """Record per-epoch scalars (``loss=...``); they go into the generation's record."""
        entry: Any = {"epoch": int(epoch), **{k: float(v) for k, v in scalars.items()}}
        self.history.append(entry)
        self._observer.epoch_ended(self.index, entry)

    def finish(self, model: nn.Module | None = None) -> GenerationRecord:
        """Evaluate, cache targets, checkpoint, and let the lineage decide; returns the record."""
        if self.finished:
            raise RuntimeError(f"generation {self.index} is already finished")
        model = self.model if model is None else model
        if not isinstance(model, nn.Module):
            raise TypeError(f"finish() needs the trained nn.Module, but got {type(model).__name__}")
        inputs = self._inputs
        if inputs.check_finished is not None:
            inputs.check_finished(model, self.index)
        self._passes.close(self.history)
        seed = stream_seed(inputs.seed, Stream.PASSES, self.index)
        fault = f"gen{self.index}" if armed("teacher") else None
        # Every rank takes part in the passes (each scores its shard and writes its rows of the
        # store); only rank 0 gets them.
        distributed.align_replicas(unwrap(model))
        loss = inputs.loss
        passed = training_pass(
            model,
            inputs.train_loader,
            inputs.replay,
            seed,
            store=(inputs.store, self.directory) if inputs.write_targets else None,
            figures=FigureSpec(loss.kind, loss.temperature, inputs.metric),
            extra=[] if inputs.spectral is None else [inputs.spectral.consumer()],
            fault=fault,
        )
        pooled: PoolPass | None = None
        try:
            if inputs.pool is not None and inputs.write_targets:
                pooled = pool_pass(model, inputs.pool, seed, inputs.store, self.directory, fault)
            heldout = evaluate(model, inputs.heldout_loader, seed)
            test = None
            if inputs.test_loader is not None:
                test = evaluate(model, inputs.test_loader, seed)
            write = None
            if passed is not None and heldout is not None:
                write = functools.partial(self._write, model, passed, heldout, test, pooled)
            self.record = self._conclude(self, write)
        finally:
            if passed is not None:
                passed.discard()  # a store that was not published (diverged, or a failure)
            if pooled is not None:
                pooled.discard()
        return self.record

    def _write(
        self,
        model: nn.Module,
        passed: TeacherPass,
        heldout: Predictions,
        test: Predictions | None,
        pooled: PoolPass | None = None,
    ) -> Measured:
        """Score the passes and write this generation's files (on the rank that writes)."""
        inputs = self._inputs
        metric = inputs.metric
        figures = passed.figures
        assert figures is not None  # finish always asks for them
        diverged = not (
            finite_module(model) and passed.finite and bool(torch.isfinite(heldout.outputs).all())
        ) or (pooled is not None and not pooled.finite)
        record: Any = {
            "generation": self.index,
            "teacher": self.teacher,
            "mode": mode_of(self.teacher, online=self.online_teacher is not None),
            "heldout": None if diverged else metric(heldout.outputs, heldout.labels),
            "test": None,
            "train": None if diverged else self._train_metric(passed),
            "ensemble": None,
            "agreement": None,
            "diverged": diverged,
        }
        if test is not None and not diverged:
            record["test"] = metric(test.outputs, test.labels)
        if not diverged:
            record.update(figures.statistics)
        self._save(model, passed, heldout, record)
        if pooled is not None and inputs.pool is not None and not diverged:
            record["pool"] = conclude(
                pooled,
                inputs.pool,
                self.directory,
                self.index,
                self.pool_teacher,
                record["checkpoint_sha256"],
            )
        if inputs.spectral is not None and not diverged:
            started = time.perf_counter()
            record.update(inputs.spectral.measure(self.index, model, passed.extra[0], record))
            record["spectrum_seconds"] = time.perf_counter() - started
        record["epochs"] = sorted(self.history, key=lambda entry: entry["epoch"])
        record["passes"] = self._passes.count  # over gen.loader, by the user's loop or fit
        record["batches"] = self._passes.batches
        record["seconds"] = time.perf_counter() - self._started
        return Measured(record, heldout)

    def _train_metric(self, passed: TeacherPass) -> float:
        """The metric on the training set against its labels: from the pass's sums, or (a
        metric without a summed form) on view 0's outputs of the whole set."""
        metric = self._inputs.metric
        form = summed_form(metric)
        if form is not None:
            assert passed.figures is not None and passed.figures.metric_sums is not None
            return float(form.from_sums(passed.figures.metric_sums))
        assert passed.view0 is not None  # kept whole for this metric
        return metric(passed.view0.outputs, passed.view0.labels)

    def _save(
        self, model: nn.Module, passed: TeacherPass, heldout: Predictions, record: Any
    ) -> None:
        """The files, in their order: checkpoint, held-out outputs, the target store."""
        directory = self.directory
        directory.mkdir(parents=True, exist_ok=True)
        teacher_sha = save_checkpoint(model, self._inputs.run.checkpoint(self.index))
        atomic_write(
            self._inputs.run.heldout(self.index),
            lambda handle: np.save(handle, heldout.outputs.numpy(), allow_pickle=False),
        )
        if record["diverged"]:
            # An earlier attempt at this generation may have left a store; it is never a teacher.
            for name in (TargetStore.MANIFEST, TargetStore.ARRAY, TargetStore.INDEX):
                (directory / name).unlink(missing_ok=True)
        elif passed.store is not None:
            passed.store.publish(self._inputs.store.fingerprint, teacher_sha)
        record["checkpoint"] = self._inputs.run.checkpoint_entry(self.index)
        record["checkpoint_sha256"] = teacher_sha

    def __repr__(self) -> str:
        return f"Generation(index={self.index}, teacher={self.teacher}, finished={self.finished})"

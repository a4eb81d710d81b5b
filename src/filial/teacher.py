"""Where the students' targets come from: the teacher pass, its store, the online teacher.

* :func:`training_pass` runs a finished generation over the training set in code order (every
  sample, and every replayed view) as one :func:`~filial.passes.stream_pass`: the batches go
  straight into the :class:`~filial.store.TargetStore` the next generation reads
  (:class:`StoreRows`, through a :class:`~filial.store.StoreWriter`) and into the sums of the
  record's figures (:class:`TrainingFigures`: entropy or norm, class shares, the training-set
  metric), so that nothing of the size of the outputs is held in memory, on the CPU or on the
  device. Under a process group every rank writes its own rows into the one store.
* :class:`TeacherStores` opens the store of a lineage's teacher when a student starts: verified
  against its manifest, and recomputed from the teacher's checkpoint when it is damaged.
* :class:`OnlineTeacherLoader` is the training loader with the teacher run on every batch
  (``teacher_mode="online"``), for augmentation no cache can replay.

Other consumers of the same pass (an unlabelled pool's figures, the rows of a fixed subset)
plug in through ``training_pass(..., extra=[...])``; see :mod:`filial.passes` for the interface.
"""

from __future__ import annotations

import logging
from collections.abc import Callable, Iterator, Sequence
from dataclasses import dataclass, field
from pathlib import Path
from typing import Any

import numpy as np
import torch
import torch.nn.functional as F
from torch import nn
from torch.utils.data import DataLoader

from . import distributed
from .checkpoint import load_model
from .data import Replay
from .evaluation import Predictions, model_device, move_to
from .metrics import AccuracySums, Metric, SummedMetric, summed_form
from .passes import Consumer, stream_pass
from .records import GenerationRecord
from .rundir import RunDirectory
from .seeding import Stream, stream_seed
from .store import StoreError, StoreWriter, TargetStore, index_dtype

log = logging.getLogger("filial")


@dataclass(frozen=True)
class StoreSpec:
    """How a lineage stores its targets."""

    dtype: str
    views: int
    top_k: int | None
    fingerprint: str  # the training data's: targets of other data are never read


@dataclass(frozen=True)
class FigureSpec:
    """What the record's figures of a teacher pass are computed with."""

    kind: str  # the loss kind: "ce" (target entropy) or "l2" (output norm)
    temperature: float
    metric: Metric  # the training-set metric against the original labels


def top_k_rows(outputs: torch.Tensor, k: int) -> tuple[torch.Tensor, torch.Tensor]:
    """The ``k`` largest outputs of each row, largest first, and their classes, in the order
    of a stable sort of the row (equal values by the lower class first), as
    :meth:`TargetStore.write` orders them with numpy's stable ``argsort``.

    Note: ties. ``torch.topk`` leaves the order of equal values open, and at the k-th value it
    may keep any of several equal outputs. The kept pairs are sorted again by (value
    descending, class ascending), and rows where the k-th value is tied with an output left
    out (rare but common in saturated or quantised outputs) are sorted in full.

    >>> values, classes = top_k_rows(torch.tensor([[1.0, 3.0, 3.0, 0.0, 3.0]]), 2)
    >>> values.tolist(), classes.tolist()
    ([[3.0, 3.0]], [[1, 2]])
    """
    values, classes = torch.topk(outputs, k, dim=1, largest=True, sorted=True)
    classes, order = classes.sort(dim=1)
    values, order = values.gather(1, order).sort(dim=1, descending=True, stable=True)
    classes = classes.gather(1, order)
    cut = (outputs >= values[:, -1:]).sum(dim=1) > k
    if bool(cut.any()):
        rows = torch.nonzero(cut).flatten()
        full, full_classes = outputs[rows].sort(dim=1, descending=True, stable=True)
        values[rows], classes[rows] = full[:, :k], full_classes[:, :k]
    return values, classes


class Peak:
    """Consumer: the largest output magnitude over every row (NaN or infinite when some
    output is): says whether the pass is finite and whether the outputs fit float16."""

    def __init__(self) -> None:
        self._peak: torch.Tensor | None = None
        self.value = float("nan")  # the result, once the pass is over

    def add(self, codes: np.ndarray, outputs: torch.Tensor, labels: torch.Tensor) -> None:
        if len(outputs):
            # One pass over the batch (aminmax propagates NaN), kept on the device: no
            # synchronisation per batch.
            low, high = torch.aminmax(outputs)
            peak = torch.maximum(-low, high)
            self._peak = peak if self._peak is None else torch.maximum(self._peak, peak)

    def result(self) -> float:
        (self.value,) = distributed.all_max([self._peak if self._peak is not None else 0.0])
        return self.value

    def abandon(self) -> None:
        pass


@dataclass
class PendingStore:
    """A store whose rows are all written, waiting to be published (on the rank that writes)."""

    writer: StoreWriter
    peak: float

    def publish(self, fingerprint: str, teacher_sha256: str) -> TargetStore:
        return self.writer.publish(
            peak=self.peak, fingerprint=fingerprint, teacher_sha256=teacher_sha256
        )

    def discard(self) -> None:
        self.writer.discard()


class StoreRows:
    """Consumer: every batch's rows written into the store's temporary files at their codes.

    Dense layout: the outputs cast to the store's dtype on their device; top-k: the k largest
    per row (:func:`top_k_rows`) and their classes. Under a process group rank 0 creates the
    files at the first batch (the output width is known then) and the other ranks join them;
    every rank writes its own rows, makes them durable and waits for the others, and rank 0
    gets the :class:`PendingStore` (None elsewhere).
    """

    def __init__(self, spec: StoreSpec, directory: Path, count: int, peak: Peak) -> None:
        self.spec = spec
        self.directory = Path(directory)
        self.count = count
        self.peak = peak  # earlier in the consumer list: its result is ready before ours
        self.writer: StoreWriter | None = None
        self._dtype = getattr(torch, spec.dtype)

    def add(self, codes: np.ndarray, outputs: torch.Tensor, labels: torch.Tensor) -> None:
        if self.writer is None:
            self.writer = self._open(outputs.shape[1])
        elif outputs.shape[1] != self.writer.classes:
            raise ValueError(
                f"the model's output width changed within one pass ({self.writer.classes} "
                f"then {outputs.shape[1]})"
            )
        if not len(codes):
            return
        if self.spec.top_k is None:
            self.writer.put(codes, outputs.to(self._dtype).cpu().numpy())
            return
        values, classes = top_k_rows(outputs, self.spec.top_k)
        kept = torch.int16 if index_dtype(outputs.shape[1]) is np.int16 else torch.int32
        self.writer.put(codes, values.to(self._dtype).cpu().numpy(), classes.to(kept).cpu().numpy())

    def _open(self, classes: int) -> StoreWriter:
        """The store's files: made here in one process; under a process group made by rank 0
        and joined by the others, by rank 0's pid (part of the temporaries' names)."""
        layout = {
            "count": self.count,
            "views": self.spec.views,
            "classes": classes,
            "dtype": self.spec.dtype,
            "top_k": self.spec.top_k,
        }
        if not distributed.is_distributed():
            return StoreWriter.create(self.directory, **layout)
        made, (owner,) = distributed.on_rank_zero_telling(
            lambda: StoreWriter.create(self.directory, **layout),
            f"creating the target store in {self.directory}",
            lambda writer: [writer.owner if writer is not None else 0],
            1,
        )
        return made if made is not None else StoreWriter.join(self.directory, owner, **layout)

    def result(self) -> PendingStore | None:
        if self.writer is None:  # no batch at all: an empty dataset is refused long before
            raise RuntimeError("the teacher pass gave no batch to write")
        self.writer.sync()  # this rank's rows are durable before rank 0 publishes them
        distributed.barrier()
        if not distributed.is_main():
            self.writer.close()
            return None
        return PendingStore(self.writer, self.peak.value)

    def abandon(self) -> None:
        if self.writer is not None:
            self.writer.discard()  # removes the files on the rank that made them


@dataclass
class PassFigures:
    """The record's figures of a teacher pass, over view 0 of every training sample."""

    statistics: dict[str, float]  # target_entropy or output_norm, prediction/label shares
    metric_sums: list[float] | None  # the training metric's sums (when it has a summed form)


class TrainingFigures:
    """Consumer: the sums behind the record's figures, over view 0 of every sample: the
    targets' entropy at the temperature (ce) or the outputs' norm (l2), the predicted and the
    true class counts (the stop rule's collapse test compares their largest shares), and the
    training metric's sums when it has a summed form (:class:`~filial.metrics.SummedMetric`).

    The per-row figures are those of the whole-set formulas (``F.log_softmax`` per row); the
    means are float64 sums divided by the count, which agree with a float32 mean over the
    whole set to its rounding. Under a process group the sums are added over the ranks.
    """

    def __init__(self, spec: FigureSpec, views: int, form: SummedMetric | None) -> None:
        self.spec = spec
        self.views = views
        self.form = form
        self._spread: torch.Tensor | float = 0.0
        self._rows = 0
        self._sums: list[Any] | None = None
        self._predicted: torch.Tensor | None = None
        self._labels = torch.zeros(0, dtype=torch.int64)
        self._classify: bool | None = None
        self._width = 0

    def add(self, codes: np.ndarray, outputs: torch.Tensor, labels: torch.Tensor) -> None:
        if self._classify is None:
            self._width = outputs.shape[1]
            self._classify = self._width > 1 and not labels.is_floating_point()
            if self._classify:
                self._predicted = torch.zeros(self._width, dtype=torch.int64, device=outputs.device)
        if self.views > 1:
            first = codes % self.views == 0
            outputs, labels = outputs[torch.from_numpy(first).to(outputs.device)], labels[first]
        if not len(outputs):
            return
        if self.spec.kind == "ce":
            scaled = outputs if self.spec.temperature == 1 else outputs / self.spec.temperature
            logp = F.log_softmax(scaled, dim=1)
            self._spread = self._spread - (logp.exp() * logp).sum(dim=1).double().sum()
        else:
            self._spread = self._spread + outputs.norm(dim=1).double().sum()
        self._rows += len(outputs)
        predicted = None
        if self._classify:
            assert self._predicted is not None
            predicted = outputs.argmax(dim=1)
            self._predicted += torch.bincount(predicted, minlength=self._width)
            counts = torch.bincount(labels.long().flatten())
            if len(counts) > len(self._labels):
                grown = torch.zeros(len(counts), dtype=torch.int64)
                grown[: len(self._labels)] = self._labels
                self._labels = grown
            self._labels[: len(counts)] += counts
        if self.form is not None:
            labels = labels.to(outputs.device, non_blocking=True)
            if predicted is not None and isinstance(self.form, AccuracySums):
                sums = self.form.sums_of_predictions(predicted, labels)  # one argmax, not two
            else:
                sums = self.form.batch_sums(outputs, labels)
            self._sums = (
                list(sums)
                if self._sums is None
                else [a + b for a, b in zip(self._sums, sums, strict=True)]
            )

    def result(self) -> PassFigures:
        sizes = len(self._sums) if self._sums is not None else 0
        (longest,) = distributed.all_max([sizes])  # a rank without view-0 rows has no sums
        sums = list(self._sums or []) + [0.0] * (int(longest) - sizes)
        spread, rows, *metric = distributed.all_sum([self._spread, self._rows, *sums])
        stats: dict[str, float] = {}
        name = "target_entropy" if self.spec.kind == "ce" else "output_norm"
        stats[name] = spread / rows
        if self._classify:
            assert self._predicted is not None
            predicted = distributed.sum_over_ranks(self._predicted)
            (length,) = distributed.all_max([len(self._labels)])
            labels = torch.zeros(int(length), dtype=torch.int64)
            labels[: len(self._labels)] = self._labels
            labels = distributed.sum_over_ranks(labels)
            stats["prediction_share"] = float(predicted.max()) / rows
            stats["label_share"] = float(labels.max()) / rows
        return PassFigures(stats, metric if self.form is not None else None)

    def abandon(self) -> None:
        pass


class ViewZeroRows:
    """Consumer: view 0's outputs of every sample, kept whole on the CPU (``N x C`` float32),
    for a training metric that needs the whole set at once. Under a process group they are
    gathered to rank 0 at the end (:func:`~filial.distributed.gather_indexed`); None on the
    other ranks."""

    def __init__(self, count: int, views: int) -> None:
        self.count = count
        self.views = views
        self._indices: list[torch.Tensor] = []
        self._outputs: list[torch.Tensor] = []
        self._labels: list[torch.Tensor] = []

    def add(self, codes: np.ndarray, outputs: torch.Tensor, labels: torch.Tensor) -> None:
        if self.views > 1:
            first = codes % self.views == 0
            codes, labels = codes[first], labels[first]
            outputs = outputs[torch.from_numpy(first).to(outputs.device)]
        self._indices.append(torch.from_numpy(codes // self.views))
        self._outputs.append(outputs.cpu())
        self._labels.append(labels)

    def result(self) -> Predictions | None:
        indices = torch.cat(self._indices)
        outputs, labels = torch.cat(self._outputs), torch.cat(self._labels)
        self._indices, self._outputs, self._labels = [], [], []
        whole = distributed.gather_indexed(indices, self.count, outputs, labels)
        return None if whole is None else Predictions(whole[0], whole[1])

    def abandon(self) -> None:
        self._indices, self._outputs, self._labels = [], [], []


@dataclass
class TeacherPass:
    """A teacher pass over the training set, on the rank that writes (rank 0)."""

    finite: bool  # every output of every view is finite
    figures: PassFigures | None  # None when not asked for (a store rebuilt on resume)
    view0: Predictions | None  # view 0 of every sample, only for a metric without sums
    store: PendingStore | None  # the written store, to publish (None: no store asked for)
    extra: list[Any] = field(default_factory=list)  # the results of the caller's consumers

    def discard(self) -> None:
        """Remove the store's temporaries unless it was published (then a no-op)."""
        if self.store is not None:
            self.store.discard()


def training_pass(
    model: nn.Module,
    train_loader: DataLoader,
    replay: Replay | None,
    seed: int,
    *,
    store: tuple[StoreSpec, Path] | None = None,
    figures: FigureSpec | None = None,
    extra: Sequence[Consumer] = (),
    fault: str | None = None,
) -> TeacherPass | None:
    """The teacher pass over the training set, streamed into the store in ``store``'s folder
    (with its spec) and into the record's ``figures``; both optional. Without a store only view
    0 is scored (a model nobody distils from). ``extra`` consumers see the same batches; their
    results are in :attr:`TeacherPass.extra`. Under a process group the ranks share the pass
    and rank 0 gets the result (None elsewhere); the store's files are then ready to publish,
    and must be published or discarded by the caller."""
    if replay is not None and store is None:
        replay = Replay(replay.seed, 1)  # nobody reads the views: view 0 is enough
    views = replay.views if replay is not None else 1
    count = len(train_loader.dataset)  # type: ignore[arg-type]
    peak = Peak()
    consumers: list[Consumer] = [peak]
    rows = summed = whole = None
    if store is not None:
        rows = StoreRows(store[0], store[1], count, peak)
        consumers.append(rows)
    if figures is not None:
        form = summed_form(figures.metric)
        summed = TrainingFigures(figures, views, form)
        consumers.append(summed)
        if form is None:
            whole = ViewZeroRows(count, views)
            consumers.append(whole)
    consumers.extend(extra)
    results = stream_pass(model, train_loader, seed, consumers, replay=replay, fault=fault)
    if not distributed.is_main():
        return None
    found = dict(zip(map(id, consumers), results, strict=True))
    return TeacherPass(
        finite=bool(np.isfinite(found[id(peak)])),
        figures=None if summed is None else found[id(summed)],
        view0=None if whole is None else found[id(whole)],
        store=None if rows is None else found[id(rows)],
        extra=results[len(consumers) - len(extra) :],
    )


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
        """Recompute the teacher's targets from its checkpoint and write them, streamed as in
        every teacher pass; under a process group every rank takes part and writes its rows,
        and rank 0 publishes (None on the other ranks)."""
        index = teacher["generation"]
        model = load_model(
            self.model_fn, self.run.recorded(teacher["checkpoint"]), teacher["checkpoint_sha256"]
        )
        seed = stream_seed(self.seed, Stream.PASSES, index)
        directory = self.run.generation(index)
        passed = training_pass(
            model, self.train_loader, self.replay, seed, store=(self.spec, directory)
        )

        def write() -> TargetStore:
            assert passed is not None and passed.store is not None  # rank 0 (or one process)
            return passed.store.publish(self.spec.fingerprint, teacher["checkpoint_sha256"])

        try:
            return distributed.on_rank_zero(
                write, f"writing generation {index}'s recomputed targets"
            )
        finally:
            if passed is not None:
                passed.discard()


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

"""An unlabelled pool: pseudo-labelled samples admitted into the students' training data.

Self-training on unlabelled data (Yarowsky 1995; Lee 2013, "pseudo-label"; Noisy Student, Xie
et al. 2020; curriculum pseudo-labelling, Cascante-Bonilla et al. 2021): every finished
generation labels the pool, a rule of :class:`Admission` picks which pool samples the next
student learns from, and the student trains on the labelled data and those samples together.
Generation 0 learns from the labels alone.

The parts, in the order data flow through them:

* :class:`PoolData` (built once by the lineage): the user's ``unlabeled_loader`` with a collate
  of ours (:class:`PoolCollate`: inputs, or ``(input, anything)`` pairs whose second item is
  ignored unless ``audit``), its fingerprint and replay.
* :func:`pool_pass`: after each generation's teacher pass over the training set, one
  :func:`~filial.passes.stream_pass` over the pool with three consumers: the pool's targets
  streamed into a :class:`~filial.store.TargetStore` in ``genG/pool/`` (``PoolRows``: the
  teacher's outputs, or one-hot rows of its class for hard pseudo-labels), the largest output
  (``Peak``) and each sample's confidence and predicted class (:class:`PoolScores`: two numbers a
  sample, never ``N x C``).
* :func:`select` (pure numpy, rank 0): which pool samples the next student trains on.
* :func:`conclude` (rank 0, in the generation's write step): the stay-once-admitted rows copied
  from the previous pool store, the selection, the files ``genG/pool/scores.npy`` and
  ``genG/pool/admitted.npy``, the published store, and the record's ``pool`` figures.
* :func:`mixed_loader`: ``gen.loader`` of a student, yielding mixed batches of labelled rows
  (their own labels) and admitted pool rows (label :data:`NO_LABEL`), each with its target.
* :class:`PoolLoss`: ``gen.loss`` of a student: the lineage's loss on the labelled rows and the
  pool term (soft targets, or cross-entropy on the hard pseudo-label) times ``weight`` on the
  pool rows, averaged over the batch's rows.

The "no label" convention: pool rows carry the label ``NO_LABEL = -1`` (as in scikit-learn's
``SelfTrainingClassifier``); a label of -1 in the user's own training data is an error.
"""

from __future__ import annotations

import dataclasses
import math
import numbers
from collections.abc import Iterator, Sequence
from dataclasses import dataclass
from pathlib import Path
from typing import Any

import numpy as np
import torch
import torch.nn.functional as F
from torch import nn
from torch.utils.data import (
    BatchSampler,
    DataLoader,
    Dataset,
    DistributedSampler,
    IterableDataset,
    RandomSampler,
    SequentialSampler,
)

from . import distributed
from ._io import atomic_write, sha256_file
from .data import (
    EpochLoader,
    IndexedDataset,
    LoaderContractError,
    Replay,
    ViewChoice,
    _common_settings,
    _Fetched,
    batch_size_of,
    gathered_targets,
    split_pair,
)
from .errors import InputError, Problems
from .losses import StudentLoss, TopKTargets, _fitting
from .passes import stream_pass
from .probe import probe
from .records import GenerationRecord
from .rundir import RunDirectory
from .seeding import derive_seed
from .store import StoreError, TargetStore
from .teacher import Peak, PendingStore, StoreRows, StoreSpec

NO_LABEL = -1  # the label of a pool row in gen.loader's batches
POOL_FOLDER = "pool"  # genG/pool/: the pool's targets, scores and admitted samples
SCORES = "scores.npy"  # the teacher's confidence and class for every pool sample
ADMITTED = "admitted.npy"  # the samples the next student trains on, their labels, confidence
SELECTIONS = ("everything", "threshold", "top", "per_class", "growing")
KEEPS = ("stay", "relabel")
PSEUDO = ("soft", "hard")
_POOL_SEED = 0x706F6F6C  # "pool": the pool's replay seeds differ from the training set's
# The files (numpy record arrays: np.save writes the same bytes for the same values, so their
# sha256 in the record is reproducible, unlike a zip's time stamps)
SCORES_DTYPE = np.dtype([("confidence", "<f4"), ("predicted", "<i8")])
ADMITTED_DTYPE = np.dtype([("index", "<i8"), ("label", "<i8"), ("confidence", "<f4")])
_CHUNK = 4096  # rows copied at once from the previous pool store (stay)


@dataclass(frozen=True)
class Admission:
    """Which pool samples each student learns from, and how.

    ``select``
        ``"everything"``: the whole pool. ``"threshold"``: samples whose teacher's top
        probability (softmax at temperature 1) is above ``threshold`` (strictly, as
        scikit-learn's ``SelfTrainingClassifier``). ``"top"``: the ``count`` most confident.
        ``"per_class"``: per predicted class the ``count`` most confident (of those above
        ``threshold``, default 0.9: pass ``threshold=None`` for no such filter; Noisy Student
        used 0.3 on ImageNet), a class with fewer duplicated in confidence order
        until it has ``count`` (Noisy Student's balancing). ``"growing"``: the most confident
        ``step * (g + 1)`` share of the pool for the student of generation ``g + 1``
        (curriculum pseudo-labelling: 20 %, 40 %, ... with ``step=0.2``).
    ``keep``
        ``"stay"``: an admitted sample keeps the pseudo-label (and target) of the teacher that
        admitted it, and later teachers choose among the rest (the classic form).
        ``"relabel"``: every teacher relabels the whole pool and the rule chooses afresh (the
        Noisy Student form).
    ``pseudo``
        ``"soft"``: the teacher's outputs as soft targets (the lineage's temperature and
        ``top_k`` apply); ``"hard"``: cross-entropy on the teacher's class.
    ``weight``
        the pool rows' term in the loss, relative to a labelled row's.
    ``audit``
        the pool's second items are its true class labels, kept only to report the
        pseudo-labels' accuracy (``audit_accuracy``); they are used for nothing else.
    ``batch_ratio``
        None (default): an epoch covers each labelled and each admitted pool sample once,
        mixed in one shuffle. ``r`` > 0: every batch holds ``round(batch * r / (1 + r))`` pool
        rows (``r`` pool rows per labelled row) and the rest labelled ones; an epoch is one
        pass over the labelled samples (in the training loader's order), the pool's admitted
        samples drawn in a shuffled cycle that continues across epochs. One process only.

    Ties in confidence go to the lower pool index.
    """

    select: str = "threshold"
    threshold: float | None = 0.9
    count: int | None = None
    step: float = 0.2
    keep: str = "relabel"
    pseudo: str = "soft"
    weight: float = 1.0
    audit: bool = False
    batch_ratio: float | None = None

    def problems(self) -> list[Exception]:
        """Every problem with these settings (empty when they are fine)."""
        found: list[Exception] = []
        for name, value, allowed in (
            ("select", self.select, SELECTIONS),
            ("keep", self.keep, KEEPS),
            ("pseudo", self.pseudo, PSEUDO),
        ):
            if value not in allowed:
                found.append(
                    ValueError(f"admission {name} must be one of {allowed}, not {value!r}")
                )
        found.extend(self._number_problems())
        return found

    def _number_problems(self) -> list[Exception]:
        found: list[Exception] = []
        threshold = self.threshold
        if threshold is not None and not (_real(threshold) and 0.0 <= threshold < 1.0):
            found.append(ValueError(f"admission threshold must lie in [0, 1), not {threshold!r}"))
        if self.select == "threshold" and threshold is None:
            found.append(ValueError("select='threshold' needs a threshold in [0, 1)"))
        count = self.count
        if self.select in ("top", "per_class") and not (
            isinstance(count, int) and not isinstance(count, bool) and count >= 1
        ):
            found.append(
                ValueError(
                    f"select={self.select!r} needs count, a whole number >= 1, not {count!r}"
                )
            )
        if not (_real(self.step) and 0.0 < self.step <= 1.0):
            found.append(ValueError(f"admission step must lie in (0, 1], not {self.step!r}"))
        if not (_real(self.weight) and self.weight >= 0.0):
            found.append(ValueError(f"admission weight must be a number >= 0, not {self.weight!r}"))
        ratio = self.batch_ratio
        if ratio is not None and not (_real(ratio) and ratio > 0):
            found.append(ValueError(f"admission batch_ratio must be None or > 0, not {ratio!r}"))
        if not isinstance(self.audit, bool):
            found.append(TypeError(f"admission audit must be True or False, not {self.audit!r}"))
        return found

    def saved(self) -> dict[str, Any]:
        return dataclasses.asdict(self)


def _real(value: Any) -> bool:
    return isinstance(value, numbers.Real) and not isinstance(value, bool) and math.isfinite(value)


# -- the pool's data ---------------------------------------------------------------------------


class PoolCollate:
    """The pool loader's collate: ``(inputs, labels)`` where labels are the audit labels, or
    :data:`NO_LABEL` for every row. ``pairs``: the pool's samples are ``(input, anything)``;
    ``single``: 1-tuples ``(input,)`` (a ``TensorDataset`` of inputs alone)."""

    def __init__(self, collate_fn: Any, pairs: bool, audit: bool, single: bool = False) -> None:
        self.collate_fn = collate_fn
        self.pairs = pairs
        self.audit = audit
        self.single = single

    def __call__(self, samples: Sequence[Any]) -> tuple[Any, torch.Tensor]:
        batch = self.collate_fn(samples)
        if not self.pairs:
            if self.single and isinstance(batch, (tuple, list)) and len(batch) == 1:
                batch = batch[0]
            return batch, torch.full((len(samples),), NO_LABEL, dtype=torch.int64)
        inputs, second = split_pair(batch)
        if not self.audit:
            return inputs, torch.full((len(samples),), NO_LABEL, dtype=torch.int64)
        labels = torch.as_tensor(second)
        if labels.is_floating_point() or labels.is_complex() or labels.ndim != 1:
            raise LoaderContractError(
                "admission audit=True reads the pool's second items as its true class labels, "
                f"but they collate to a {labels.dtype} tensor of shape {tuple(labels.shape)}; "
                "they must be integer class labels, one per sample (or set audit=False)"
            )
        return inputs, labels.long()


@dataclass(frozen=True)
class PoolData:
    """The user's unlabelled pool, as the lineage works with it."""

    loader: DataLoader  # over the pool's dataset, collating to (inputs, audit labels or -1)
    admission: Admission
    size: int
    pairs: bool
    fingerprint: str
    replay: Replay | None  # the pool's samples fetched under seeds (students read them cached)

    @property
    def dataset(self) -> Any:
        return self.loader.dataset

    def saved(self) -> dict[str, Any]:
        """The ``pool`` entry of ``lineage.json``'s settings (compared on resume)."""
        return {
            **self.admission.saved(),
            "size": self.size,
            "fingerprint": self.fingerprint,
            "replayed": self.replay is not None,
        }


def check_pool_loader(loader: Any) -> int:
    """The pool's size, or the error that names what is wrong with ``loader``."""
    if not isinstance(loader, DataLoader):
        raise LoaderContractError(
            f"unlabeled_loader must be a torch.utils.data.DataLoader, not {type(loader).__name__}"
        )
    if isinstance(loader.dataset, IterableDataset):
        raise LoaderContractError(
            "unlabeled_loader wraps an IterableDataset; the pool needs a map-style dataset "
            "(__len__ and __getitem__) so that every pseudo-label belongs to one sample index"
        )
    if loader.batch_sampler is None:
        raise LoaderContractError("unlabeled_loader needs batches: pass batch_size=...")
    try:
        size = len(loader.dataset)  # type: ignore[arg-type]
    except TypeError as exc:
        raise LoaderContractError("unlabeled_loader's dataset has no __len__") from exc
    if size == 0:
        raise InputError(
            "unlabeled_loader's dataset is empty: a pool needs at least one sample (pass "
            "unlabeled_loader=None to train on the labelled data alone)"
        )
    return size


def _is_pair(sample: Any) -> bool:
    return isinstance(sample, (tuple, list)) and len(sample) == 2


def pool_data(
    loader: DataLoader, admission: Admission, train_replay: Replay | None, seed: int
) -> PoolData:
    """Check the pool and build its :class:`PoolData` (nothing is written)."""
    size = check_pool_loader(loader)
    first = loader.dataset[0]
    pairs = _is_pair(first)
    single = isinstance(first, (tuple, list)) and len(first) == 1
    if admission.audit and not pairs:
        raise LoaderContractError(
            "admission audit=True needs a pool of (input, true label) pairs, but the pool's "
            f"samples are {type(loader.dataset[0]).__name__}s, not pairs"
        )
    settings = _common_settings(loader)
    passes = DataLoader(
        loader.dataset,
        batch_size=batch_size_of(loader),
        collate_fn=PoolCollate(loader.collate_fn, pairs, admission.audit, single),
        **settings,
    )
    probed = probe(passes)
    views = train_replay.views if train_replay is not None else 1
    replay = None
    if train_replay is not None or probed.varies:
        replay = Replay(derive_seed(seed, _POOL_SEED), views)
    return PoolData(passes, admission, size, pairs, probed.fingerprint, replay)


def check_mixable(train_loader: DataLoader, admission: Admission | None = None) -> None:
    """The students' epochs go over the labelled and admitted samples together, so filial
    builds their sampler: from a loader with ``batch_size`` (shuffled or not) or a
    DistributedSampler (not with ``batch_ratio``)."""
    sampler = _mixed_sampler(train_loader, range(1))
    if admission is not None and admission.batch_ratio is not None:
        if isinstance(sampler, DistributedSampler):
            raise ValueError(
                "admission batch_ratio fixes the pool rows of every batch in one process; "
                "under a process group leave batch_ratio=None (each epoch then covers the "
                "labelled and admitted samples once, sharded by a DistributedSampler)"
            )


def _mixed_sampler(train_loader: DataLoader, dataset: Any) -> Any:
    sampler = train_loader.sampler
    plain = type(train_loader.batch_sampler) is BatchSampler and train_loader.batch_size
    if plain and isinstance(sampler, DistributedSampler):
        return DistributedSampler(
            dataset,
            num_replicas=sampler.num_replicas,
            rank=sampler.rank,
            shuffle=sampler.shuffle,
            seed=sampler.seed,
            drop_last=sampler.drop_last,
        )
    if plain and type(sampler) is SequentialSampler:
        return SequentialSampler(dataset)
    if plain and type(sampler) is RandomSampler and not sampler.replacement:
        if sampler._num_samples is None:
            return RandomSampler(dataset, generator=sampler.generator)
    raise LoaderContractError(
        "with an unlabeled pool, a student's epoch goes over the labelled and the admitted "
        "pool samples together, so filial builds its sampler; it can for a training loader "
        "built with batch_size (shuffle=True or False) or with a DistributedSampler, but this "
        f"one has a {type(train_loader.batch_sampler).__name__} over a "
        f"{type(sampler).__name__}"
    )


# -- the pass over the pool --------------------------------------------------------------------


@dataclass
class Scores:
    """Each pool sample's teacher confidence and class (view 0), and its audit label."""

    confidence: np.ndarray  # (N,) float32: the top softmax probability at temperature 1
    predicted: np.ndarray  # (N,) int64
    truth: np.ndarray | None  # (N,) int64, only with audit


class PoolScores:
    """Consumer: the top softmax probability (temperature 1) and its class per pool sample,
    kept on the model's device as the batches come (two numbers a sample); gathered to rank 0
    at the end."""

    def __init__(self, count: int, views: int, audit: bool) -> None:
        self.count, self.views, self.audit = count, views, audit
        self._codes: list[torch.Tensor] = []
        self._confidence: list[torch.Tensor] = []
        self._predicted: list[torch.Tensor] = []
        self._truth: list[torch.Tensor] = []

    def add(self, codes: np.ndarray, outputs: torch.Tensor, labels: torch.Tensor) -> None:
        if self.views > 1:
            first = codes % self.views == 0
            codes, labels = codes[first], labels[first]
            outputs = outputs[torch.from_numpy(first).to(outputs.device)]
        confidence, predicted = F.softmax(outputs, dim=1).max(dim=1)
        self._codes.append(torch.from_numpy(codes // self.views))
        self._confidence.append(confidence)
        self._predicted.append(predicted)
        if self.audit:
            self._truth.append(labels.long())

    def result(self) -> Scores | None:
        if not self._codes:  # a rank whose shard held no batch at all
            self._codes = [torch.zeros(0, dtype=torch.int64)]
            self._confidence = [torch.zeros(0)]
            self._predicted = [torch.zeros(0, dtype=torch.int64)]
            self._truth = [torch.zeros(0, dtype=torch.int64)]
        values = [torch.cat(self._confidence).cpu().double(), torch.cat(self._predicted).cpu()]
        if self.audit:
            values.append(torch.cat(self._truth))
        whole = distributed.gather_indexed(torch.cat(self._codes), self.count, *values)
        self.abandon()
        if whole is None:
            return None
        truth = whole[2].numpy().astype(np.int64) if self.audit else None
        return Scores(whole[0].numpy().astype(np.float32), whole[1].numpy().astype(np.int64), truth)

    def abandon(self) -> None:
        self._codes, self._confidence, self._predicted, self._truth = [], [], [], []


class PoolRows(StoreRows):
    """Consumer: the pool's targets into its store; with hard pseudo-labels a one-hot row of
    the teacher's class (exact in float16, and its argmax is the class)."""

    def __init__(self, *args: Any, hard: bool, **kwargs: Any) -> None:
        super().__init__(*args, **kwargs)
        self.hard = hard

    def add(self, codes: np.ndarray, outputs: torch.Tensor, labels: torch.Tensor) -> None:
        if self.hard:
            outputs = F.one_hot(outputs.argmax(dim=1), outputs.shape[1]).float()
        super().add(codes, outputs, labels)


@dataclass
class PoolPass:
    """The pass over the pool, on the rank that writes."""

    finite: bool
    scores: Scores
    store: PendingStore

    def discard(self) -> None:
        self.store.discard()


def pool_folder(directory: Path) -> Path:
    return Path(directory) / POOL_FOLDER


def pool_pass(
    model: nn.Module,
    pool: PoolData,
    seed: int,
    spec: StoreSpec,
    directory: Path,
    fault: str | None = None,
) -> PoolPass | None:
    """The finished generation over the whole pool (every replayed view), streamed into the
    pool store in ``directory/pool`` and the per-sample scores; rank 0 gets the result."""
    views = pool.replay.views if pool.replay is not None else 1
    pool_spec = StoreSpec(spec.dtype, views, spec.top_k, pool.fingerprint)
    peak = Peak()
    rows = PoolRows(
        pool_spec, pool_folder(directory), pool.size, peak, hard=pool.admission.pseudo == "hard"
    )
    scores = PoolScores(pool.size, views, pool.admission.audit)
    found = stream_pass(
        model, pool.loader, seed, [peak, rows, scores], replay=pool.replay, fault=fault
    )
    if not distributed.is_main():
        return None
    return PoolPass(bool(np.isfinite(found[0])), found[2], found[1])


# -- selection ---------------------------------------------------------------------------------


def by_confidence(confidence: np.ndarray, among: np.ndarray) -> np.ndarray:
    """``among`` (pool indices) from the most confident down, ties to the lower index."""
    order = np.lexsort((among, -confidence[among].astype(np.float64)))
    return among[order]


def balanced(
    confidence: np.ndarray, predicted: np.ndarray, among: np.ndarray, count: int, classes: int
) -> np.ndarray:
    """Noisy Student's balancing: per predicted class the ``count`` most confident of
    ``among``; a class with fewer (but some) repeats them, most confident first, up to
    ``count``; a class with none gets none. Sorted by pool index."""
    chosen = []
    ranked = by_confidence(confidence, among)
    for cls in range(classes):
        mine = ranked[predicted[ranked] == cls]
        if len(mine):
            chosen.append(np.resize(mine, count))  # np.resize repeats cyclically
    return np.sort(np.concatenate(chosen)) if chosen else np.zeros(0, dtype=np.int64)


def select(
    admission: Admission,
    confidence: np.ndarray,
    predicted: np.ndarray,
    student: int,
    held: np.ndarray,
    classes: int,
) -> np.ndarray:
    """The pool indices newly admitted for the student of generation ``student`` (>= 1),
    given the samples ``held`` from earlier generations (stay; empty for relabel).
    Sorted; ``per_class`` may repeat indices."""
    size = len(confidence)
    free = np.ones(size, dtype=bool)
    free[held] = False
    among = np.flatnonzero(free)
    rule = admission.select
    if rule == "everything":
        return among
    if rule == "threshold":
        assert admission.threshold is not None
        return among[confidence[among] > admission.threshold]
    if rule == "top":
        assert admission.count is not None
        return np.sort(by_confidence(confidence, among)[: admission.count])
    if rule == "per_class":
        assert admission.count is not None
        if admission.threshold is not None:
            among = among[confidence[among] > admission.threshold]
        return balanced(confidence, predicted, among, admission.count, classes)
    share = min(1.0, admission.step * student)
    wanted = max(0, math.floor(share * size + 0.5) - len(held))
    return np.sort(by_confidence(confidence, among)[:wanted])


# -- what a student reads, and what a generation writes ------------------------------------------


@dataclass
class Admitted:
    """The pool samples a student trains on (one slot each; a sample may fill several) with
    their pseudo-labels and the confidence they were admitted with."""

    index: np.ndarray  # (A,) int64 pool indices
    label: np.ndarray  # (A,) int64
    confidence: np.ndarray  # (A,) float32

    @classmethod
    def empty(cls) -> Admitted:
        return cls(np.zeros(0, np.int64), np.zeros(0, np.int64), np.zeros(0, np.float32))

    @classmethod
    def load(cls, path: Path) -> Admitted:
        found = np.load(path, allow_pickle=False)
        return cls(found["index"].copy(), found["label"].copy(), found["confidence"].copy())

    def write(self, path: Path) -> None:
        table = np.zeros(len(self.index), dtype=ADMITTED_DTYPE)
        table["index"], table["label"], table["confidence"] = (
            self.index, self.label, self.confidence
        )
        atomic_write(path, lambda handle: np.save(handle, table, allow_pickle=False))


@dataclass
class PoolTeacher:
    """A student's side of the pool: the teacher's pool store and the admitted samples."""

    store: TargetStore
    admitted: Admitted
    folder: Path


def open_teacher(run: RunDirectory, teacher: GenerationRecord, pool: PoolData) -> PoolTeacher:
    """The pool files of ``teacher``'s generation, checked against its record."""
    folder = pool_folder(run.generation(teacher["generation"]))
    entry: Any = teacher.get("pool")
    if not isinstance(entry, dict):
        raise StoreError(
            f"generation {teacher['generation']}'s record has no pool figures, so it labelled "
            "no pool: the run was made without an unlabeled_loader, or the generation diverged"
        )
    store = TargetStore(folder)
    try:
        store.verify(fingerprint=pool.fingerprint)
        if store.manifest["teacher_sha256"] != teacher.get("checkpoint_sha256"):
            raise StoreError(f"the pool targets in {folder} were not made by its checkpoint")
        for name in (SCORES, ADMITTED):
            if sha256_file(folder / name) != entry["sha256"][name]:
                raise StoreError(f"{folder / name} does not match the sha256 in its record")
    except (StoreError, OSError, KeyError) as exc:
        raise StoreError(
            f"the pool files of generation {teacher['generation']} in {folder} are damaged or "
            f"missing ({exc}); they cannot be recomputed (kept pseudo-labels depend on earlier "
            "generations): start a new run directory"
        ) from exc
    return PoolTeacher(store, Admitted.load(folder / ADMITTED), folder)


def _stay(pending: PendingStore, previous: PoolTeacher, held: np.ndarray) -> None:
    """Copy the earlier teacher's rows of the ``held`` samples over this pass's rows."""
    writer, views = pending.writer, previous.store.shape[1]
    for start in range(0, len(held), _CHUNK):
        chunk = held[start : start + _CHUNK]
        for view in range(views):
            codes = chunk * views + view
            at = np.full(len(chunk), view, dtype=np.int64)
            rows = previous.store.gather(chunk, at)
            if isinstance(rows, tuple):
                writer.put(codes, rows[0], rows[1])
            else:
                writer.put(codes, rows)


def _admitted(
    pool: PoolData, scores: Scores, student: int, previous: PoolTeacher | None, classes: int
) -> tuple[Admitted, int]:
    """The samples the next student trains on, and how many of them are new."""
    held = Admitted.empty()
    if pool.admission.keep == "stay" and previous is not None:
        held = previous.admitted
    new = select(
        pool.admission, scores.confidence, scores.predicted, student, held.index, classes
    )
    fresh = Admitted(new, scores.predicted[new], scores.confidence[new])
    if not len(held.index):
        return fresh, len(new)
    merged = [np.concatenate([a, b]) for a, b in zip(
        (held.index, held.label, held.confidence), (new, fresh.label, fresh.confidence),
        strict=True,
    )]
    order = np.argsort(merged[0], kind="stable")
    return Admitted(*(part[order] for part in merged)), len(new)


def conclude(
    passed: PoolPass,
    pool: PoolData,
    directory: Path,
    index: int,
    previous: PoolTeacher | None,
    teacher_sha256: str,
) -> dict[str, Any]:
    """Rank 0, in generation ``index``'s write step: choose the next student's pool samples,
    write the pool's files (scores, admitted, then the store, published last) and return the
    record's ``pool`` figures."""
    scores = passed.scores
    classes = int(passed.store.writer.classes)
    admitted, new = _admitted(pool, scores, index + 1, previous, classes)
    folder = pool_folder(directory)
    folder.mkdir(parents=True, exist_ok=True)
    held = np.unique(admitted.index)
    if previous is not None and pool.admission.keep == "stay":
        kept = np.intersect1d(held, np.unique(previous.admitted.index))
        if len(kept):
            _stay(passed.store, previous, kept)
    table = np.zeros(len(scores.confidence), dtype=SCORES_DTYPE)
    table["confidence"], table["predicted"] = scores.confidence, scores.predicted
    atomic_write(folder / SCORES, lambda handle: np.save(handle, table, allow_pickle=False))
    admitted.write(folder / ADMITTED)
    passed.store.publish(pool.fingerprint, teacher_sha256)
    figures = figures_of(pool, scores, admitted, new, classes, previous)
    figures["sha256"] = {name: sha256_file(folder / name) for name in (SCORES, ADMITTED)}
    return figures


def figures_of(
    pool: PoolData,
    scores: Scores,
    admitted: Admitted,
    new: int,
    classes: int,
    previous: PoolTeacher | None,
) -> dict[str, Any]:
    """The record's ``pool`` figures of a generation's pass over the pool."""
    distinct = np.unique(admitted.index)
    figures: dict[str, Any] = {
        "size": pool.size,
        "admitted": len(admitted.index),
        "distinct": len(distinct),
        "share": len(distinct) / pool.size,
        "new": new,
        "mean_confidence": float(admitted.confidence.mean()) if len(distinct) else None,
        "pool_confidence": float(scores.confidence.astype(np.float64).mean()),
        "per_class": np.bincount(admitted.label, minlength=classes).tolist(),
        "agreement": None,
        "audit_accuracy": None,
        "audit_pool_accuracy": None,
        "trained_on": 0 if previous is None else len(previous.admitted.index),
    }
    if previous is not None:
        earlier = np.load(previous.folder / SCORES, mmap_mode="r", allow_pickle=False)
        figures["agreement"] = float((earlier["predicted"] == scores.predicted).mean())
    if scores.truth is not None:
        truth = scores.truth
        figures["audit_pool_accuracy"] = float((scores.predicted == truth).mean())
        if len(admitted.index):
            figures["audit_accuracy"] = float((admitted.label == truth[admitted.index]).mean())
    return figures


# -- the students' mixed batches -----------------------------------------------------------------


class _Mixed:
    """A mixed batch's labelled and pool samples, on their way to :class:`MixedCollate`."""

    __slots__ = ("labelled", "pool", "pool_slots")

    def __init__(self, labelled: _Fetched | None, pool: _Fetched | None, pool_slots: Any) -> None:
        self.labelled, self.pool, self.pool_slots = labelled, pool, pool_slots


class MixedDataset(Dataset):
    """The labelled samples (indices ``0 .. L-1``) followed by one slot per admitted pool
    sample (``L .. L+A-1``); with several views the indices are codes ``j * views + v``."""

    def __init__(
        self, labelled: IndexedDataset, pool: IndexedDataset, admitted: np.ndarray, views: int
    ) -> None:
        self.labelled, self.pool = labelled, pool
        self.admitted = np.asarray(admitted, dtype=np.int64)
        self.views = views
        self.count = len(labelled)

    def __len__(self) -> int:
        return self.count + len(self.admitted)

    def __getitem__(self, index: int) -> Any:
        raise LoaderContractError(
            "the mixed training data are fetched a batch at a time; filial needs automatic "
            "batching (batch_size) on the training loader"
        )

    def __getitems__(self, codes: Sequence[int]) -> _Mixed:
        slots, views = np.divmod(np.asarray(codes, dtype=np.int64), self.views)
        mine = slots < self.count
        labelled = pool = None
        if mine.any():
            picked = slots[mine] * self.views + views[mine] if self.views > 1 else slots[mine]
            labelled = self.labelled.__getitems__(picked.tolist())
        others = ~mine
        pool_slots = slots[others] - self.count
        if others.any():
            samples = self.admitted[pool_slots]
            picked = samples * self.views + views[others] if self.views > 1 else samples
            pool = self.pool.__getitems__(picked.tolist())
        return _Mixed(labelled, pool, pool_slots)


def cat_inputs(first: Any, second: Any) -> Any:
    """Two collated batches of inputs as one (tensors, or tuples, lists, dicts of them)."""
    if isinstance(first, torch.Tensor):
        return torch.cat([first, second])
    if isinstance(first, (tuple, list)):
        return type(first)(cat_inputs(a, b) for a, b in zip(first, second, strict=True))
    if isinstance(first, dict):
        return {key: cat_inputs(first[key], second[key]) for key in first}
    raise LoaderContractError(
        "with an unlabeled pool, labelled and pool inputs are joined into one batch, which "
        f"filial can do for tensors (and tuples, lists, dicts of them), not {type(first).__name__}"
    )


def _cat_targets(first: Any, second: Any) -> Any:
    if isinstance(first, TopKTargets):
        return TopKTargets(
            torch.cat([first.values, second.values]), torch.cat([first.classes, second.classes])
        )
    return torch.cat([first, second])


def check_no_label(labels: Any) -> None:
    """Refuse training labels that use the pool's "no label" value."""
    if isinstance(labels, torch.Tensor) and bool((labels == NO_LABEL).any()):
        raise InputError(_NO_LABEL_USED)


_NO_LABEL_USED = (
    f"a training label is {NO_LABEL}, which with an unlabeled pool marks the pool's rows in "
    "gen.loader's batches (filial's 'no label', as in scikit-learn's SelfTrainingClassifier); "
    "relabel the classes from 0"
)


class MixedCollate:
    """Collate a mixed batch: labelled rows first (the user's collate, their labels and the
    teacher's targets), then pool rows (the pool loader's collate, label :data:`NO_LABEL`, the
    pool store's targets)."""

    def __init__(
        self, collate_fn: Any, pool_collate: PoolCollate, store: TargetStore, pool: TargetStore
    ) -> None:
        self.collate_fn, self.pool_collate = collate_fn, pool_collate
        self.store, self.pool = store, pool

    def __call__(self, fetched: Any) -> tuple[Any, torch.Tensor, Any]:
        if not isinstance(fetched, _Mixed):
            raise LoaderContractError(
                "the mixed training data were indexed one sample at a time; filial needs "
                "automatic batching (batch_size) on the training loader"
            )
        parts = []
        if fetched.labelled is not None:
            inputs, labels = split_pair(self.collate_fn(fetched.labelled.samples))
            labels = torch.as_tensor(labels)
            if bool((labels == NO_LABEL).any()):
                raise LoaderContractError(_NO_LABEL_USED)
            parts.append((inputs, labels, gathered_targets(self.store, fetched.labelled)))
        if fetched.pool is not None:
            inputs = self.pool_collate(fetched.pool.samples)[0]
            labels = torch.full((len(fetched.pool.samples),), NO_LABEL, dtype=torch.int64)
            parts.append((inputs, labels, gathered_targets(self.pool, fetched.pool)))
        if len(parts) == 1:
            return parts[0]
        (a_in, a_lab, a_t), (b_in, b_lab, b_t) = parts
        return cat_inputs(a_in, b_in), torch.cat([a_lab, b_lab.to(a_lab.dtype)]), _cat_targets(
            a_t, b_t
        )


class RatioBatches:
    """Batches of ``batch`` rows with a fixed share of pool rows (``Admission.batch_ratio``):
    ``pool_rows = round(batch * ratio / (1 + ratio))`` (at least 1 when any pool sample is
    admitted, at most ``batch - 1``) and the rest labelled, taken in the order of ``sampler``
    (over the labelled indices); an epoch ends when the labelled samples are used up. The
    pool's slots ``labelled .. labelled + slots - 1`` come in a permutation drawn from a
    private generator seeded from ``seed``, a new one each time it runs out."""

    def __init__(
        self,
        sampler: Any,
        labelled: int,
        slots: int,
        batch: int,
        ratio: float,
        drop_last: bool,
        seed: int,
    ) -> None:
        self.sampler, self.labelled, self.slots = sampler, labelled, slots
        pool_rows = min(batch - 1, max(1, round(batch * ratio / (1.0 + ratio)))) if slots else 0
        self.pool_rows, self.labelled_rows = pool_rows, batch - pool_rows
        self.drop_last = drop_last
        self.generator = torch.Generator().manual_seed(seed)
        self._cycle: list[int] = []

    def __len__(self) -> int:
        if self.drop_last:
            return self.labelled // self.labelled_rows
        return -(-self.labelled // self.labelled_rows)

    def _pool(self, count: int) -> list[int]:
        taken: list[int] = []
        while len(taken) < count:
            if not self._cycle:
                order = torch.randperm(self.slots, generator=self.generator) + self.labelled
                self._cycle = order.tolist()
            want = count - len(taken)
            taken += self._cycle[:want]
            self._cycle = self._cycle[want:]
        return taken

    def __iter__(self) -> Iterator[list[int]]:
        chunk: list[int] = []
        for index in self.sampler:
            chunk.append(int(index))
            if len(chunk) == self.labelled_rows:
                yield chunk + self._pool(self.pool_rows)
                chunk = []
        if chunk and not self.drop_last:
            yield chunk + self._pool(self.pool_rows)


def mixed_loader(
    train_loader: DataLoader,
    pool: PoolData,
    teacher: PoolTeacher,
    store: TargetStore,
    replay: Replay | None,
    choice_seed: int,
) -> DataLoader:
    """A student's ``gen.loader``: the user's training loader rebuilt over the labelled
    samples and the admitted pool slots (each once an epoch), with all its settings (batch
    size, ``drop_last``, workers, generator, pinning); shuffled as the user's sampler did."""
    views = replay.views if replay is not None else 1
    pool_views = pool.replay.views if pool.replay is not None else 1
    if pool_views != views:
        raise RuntimeError(f"the pool has {pool_views} views, the training set {views}")
    dataset = MixedDataset(
        IndexedDataset(train_loader.dataset, replay),
        IndexedDataset(pool.dataset, pool.replay),
        teacher.admitted.index,
        views,
    )
    ratio = pool.admission.batch_ratio
    sampler = _mixed_sampler(train_loader, dataset if ratio is None else range(dataset.count))
    batch_sampler: Any = BatchSampler(
        sampler, batch_size_of(train_loader), drop_last=train_loader.drop_last
    )
    if ratio is not None:
        batch_sampler = RatioBatches(
            sampler, dataset.count, len(dataset.admitted), batch_size_of(train_loader),
            ratio, train_loader.drop_last, choice_seed,
        )
    if views > 1:
        batch_sampler = ViewChoice(batch_sampler, views, choice_seed)
    pool_collate = pool.loader.collate_fn
    assert isinstance(pool_collate, PoolCollate)
    collate = MixedCollate(train_loader.collate_fn, pool_collate, store, teacher.store)
    kind: Any = DataLoader
    extra: dict[str, Any] = {}
    if isinstance(sampler, DistributedSampler):
        kind, extra = EpochLoader, {"epoch_sampler": sampler}
    return kind(
        dataset,
        batch_sampler=batch_sampler,
        collate_fn=collate,
        generator=train_loader.generator,
        persistent_workers=train_loader.persistent_workers,
        **_common_settings(train_loader),
        **extra,
    )


# -- the students' loss --------------------------------------------------------------------------


def soft_rows(outputs: torch.Tensor, targets: Any, temperature: float) -> torch.Tensor:
    """Per row, ``T**2 * -sum_c softmax(v/T)_c log_softmax(z/T)_c`` (Hinton et al. 2015), the
    teacher known in full or by its top k (as :mod:`filial.losses` does, unreduced)."""
    t = float(temperature)
    if isinstance(targets, TopKTargets):
        teacher = F.softmax(targets.values / t, dim=-1)
        student = F.log_softmax(outputs / t, dim=-1).gather(1, targets.classes.long())
    else:
        teacher = F.softmax(targets / t, dim=-1)
        student = F.log_softmax(outputs / t, dim=-1)
    return -(teacher * student).sum(dim=-1) * (t * t)


def hard_labels(targets: Any) -> torch.Tensor:
    """The class of each row of targets (the top-k layout keeps it first)."""
    if isinstance(targets, TopKTargets):
        return targets.classes[:, 0].long()
    return targets.argmax(dim=1)


class PoolLoss:
    """A student's loss over mixed batches: for a labelled row the lineage's loss (its
    ``label_weight`` mix of the label and teacher terms), for a pool row (label
    :data:`NO_LABEL`) ``weight`` times the soft-target term or the cross-entropy on its hard
    pseudo-label; the mean over the batch's rows. Masks, not boolean indexing: no device
    synchronisation per batch. Without targets (generation 0) it is the lineage's loss."""

    def __init__(self, base: StudentLoss, admission: Admission) -> None:
        self.base = base
        self.weight = float(admission.weight)
        self.hard = admission.pseudo == "hard"
        self._checked = False

    def __call__(self, outputs: torch.Tensor, labels: torch.Tensor, targets: Any) -> torch.Tensor:
        base = self.base
        if targets is None:
            return base(outputs, labels, None)
        if not self._checked:
            base.check(outputs, torch.as_tensor(labels).clamp(min=0))
            self._checked = True
        if labels.device != outputs.device:
            labels = labels.to(outputs.device, non_blocking=True)
        targets = _fitting(targets, outputs)
        unlabelled = labels == NO_LABEL
        known = labels.masked_fill(unlabelled, 0)
        teacher = soft_rows(outputs, targets, base.temperature)
        weight = base.label_weight
        labelled = teacher
        if weight != 0.0:
            by_label = F.cross_entropy(
                outputs, known, reduction="none", label_smoothing=base.label_smoothing
            )
            labelled = by_label if weight == 1.0 else (1.0 - weight) * teacher + weight * by_label
        if self.hard:
            pool_rows = F.cross_entropy(outputs, hard_labels(targets), reduction="none")
        else:
            pool_rows = teacher
        rows = torch.where(unlabelled, self.weight * pool_rows, labelled)
        return rows.mean()


def check_pool_settings(
    problems: Problems, admission: Any, unlabeled_loader: Any, targets: str, teacher_mode: str
) -> Admission | None:
    """The pool's settings, checked with the lineage's (None without a pool)."""
    if unlabeled_loader is None:
        if admission is not None:
            problems.add(ValueError("admission=... needs an unlabeled_loader to admit from"))
        return None
    if admission is None:
        admission = Admission()
    if not isinstance(admission, Admission):
        problems.add(TypeError(f"admission must be a filial.Admission, not {admission!r}"))
        return None
    for problem in admission.problems():
        problems.add(problem)
    if targets != "ce":
        problems.add(
            ValueError(
                "an unlabeled pool is pseudo-labelled with classes, so it needs targets='ce', "
                f"not targets={targets!r}"
            )
        )
    if teacher_mode == "online":
        problems.add(
            ValueError(
                "an unlabeled pool is admitted from a cached teacher pass; "
                "teacher_mode='online' with a pool is not supported: use teacher_mode='cached'"
            )
        )
    return admission


def iter_pool_figures(records: Sequence[Any]) -> Iterator[tuple[int, dict[str, Any]]]:
    """``(generation, pool figures)`` of every record that has them."""
    for record in records:
        entry = record.get("pool")
        if isinstance(entry, dict):
            yield int(record["generation"]), entry


def _cell(value: Any, width: int, digits: int = 4) -> str:
    if value is None:
        return f"{'-':>{width}}"
    if isinstance(value, float):
        return f"{value:>{width}.{digits}f}"
    return f"{value:>{width}}"


def pool_lines(records: Sequence[Any], best: int | None) -> list[str]:
    """The report's lines about the pool (none for a run without one): per generation what
    it trained on and what its pass admitted for the next student, and a plain sentence when
    generation 0 (the labelled data alone) was kept."""
    rows = list(iter_pool_figures(records))
    if not rows:
        return []
    size = rows[0][1]["size"]
    out = [
        f"unlabelled pool ({size} samples): 'trained on' = pool slots the generation learnt "
        "from; the rest = its pass over the pool, admitted for the next student",
        f"{'gen':>4} {'trained on':>10} {'admitted':>8} {'share':>6} {'new':>6} "
        f"{'confidence':>10} {'agree':>6} {'audit':>6} {'pool audit':>10}",
    ]
    for generation, f in rows:
        out.append(
            f"{generation:>4} {_cell(f['trained_on'], 10)} {_cell(f['admitted'], 8)} "
            f"{_cell(f['share'], 6, 3)} {_cell(f['new'], 6)} "
            f"{_cell(f['mean_confidence'], 10)} {_cell(f['agreement'], 6, 3)} "
            f"{_cell(f['audit_accuracy'], 6, 3)} {_cell(f['audit_pool_accuracy'], 10, 3)}"
        )
    if best == 0:
        out.append(
            "generation 0 (the labelled data alone) was kept: self-training on the unlabelled "
            "pool did not help on the held-out data"
        )
    elif best is not None:
        kept = dict(rows).get(best, {})
        if kept.get("trained_on"):
            out.append(
                f"generation {best}, trained with {kept['trained_on']} pseudo-labelled pool "
                "slots, was kept"
            )
        else:
            out.append(
                f"generation {best} was kept, but it trained on no pool sample (its teacher "
                "admitted none): a gain over generation 0 is not self-training's"
            )
    return out


_SCALARS = (
    "trained_on", "admitted", "share", "new", "mean_confidence", "agreement",
    "audit_accuracy", "audit_pool_accuracy",
)


def pool_scalars(record: Any) -> list[tuple[str, float]]:
    """The TensorBoard scalars of a record's ``pool`` figures (tags under ``pool/``; the
    admitted per class as ``pool/class/C``); none without a pool."""
    figures = record.get("pool")
    if not isinstance(figures, dict):
        return []
    found = [(f"pool/{key}", float(figures[key])) for key in _SCALARS if _real(figures.get(key))]
    found += [(f"pool/class/{c}", float(n)) for c, n in enumerate(figures.get("per_class", []))]
    return found

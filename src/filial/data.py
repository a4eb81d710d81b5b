"""Index-carrying wrappers around the user's DataLoader, and seed derivation.

The student loop needs, for every sample in a batch, the teacher's output for *that* sample. The
wrappers here carry each sample's dataset index from the fetch to the collate function, where one
vectorised gather reads the batch's rows from the :class:`~filial.store.TargetStore`:

* :class:`IndexedDataset` wraps the user's map-style dataset; its ``__getitems__`` hands the
  batch's indices to the collate function together with the samples.
* :class:`IndexedCollate` calls the user's own ``collate_fn`` on the samples, checks that the
  batch is an ``(inputs, labels)`` pair and attaches the targets (or the indices).
* :func:`training_loader` and :func:`sequential_loader` rebuild the user's DataLoader with every
  setting it had (sampler or batch sampler, workers, ``worker_init_fn``, generator, pinning ...).

All of them pickle (no lambdas, no open files) so DataLoader workers started with ``spawn``
(the default on macOS) work; the store opens its memory map lazily in each process.

Replayed views (:class:`Replay`): a cached target is right only for the exact input the teacher
saw. For a dataset with random augmentation, sample ``i`` in view ``v`` is fetched with torch's,
Python's and numpy's global generators seeded from ``(seed, i, v)``, so the teacher pass and every
student epoch see the same tensors for ``(i, v)``. A batch sampler index then carries the view:
``code = i * views + v``.
"""

from __future__ import annotations

import inspect
import random
from collections.abc import Iterator, Sequence
from dataclasses import dataclass, field
from typing import Any

import numpy as np
import torch
from torch.utils.data import (
    BatchSampler,
    DataLoader,
    Dataset,
    DistributedSampler,
    IterableDataset,
    RandomSampler,
    Sampler,
    SequentialSampler,
)

from .errors import InputError
from .losses import TopKTargets
from .seeding import derive_seed, preserved_rng, samplers_of
from .store import TargetStore

_LOADER_PARAMS = set(inspect.signature(DataLoader.__init__).parameters)


class LoaderContractError(InputError, TypeError):
    """The user's loader or its batches do not fit what filial needs."""


_PAIR_CONTRACT = (
    "filial needs every batch to be an (inputs, labels) pair: the dataset's __getitem__ (or your "
    "collate_fn) must return two items, the model's input and the label."
)


def check_loader(loader: Any, role: str) -> DataLoader:
    """Check that ``loader`` is a map-style, batched DataLoader; return it."""
    if not isinstance(loader, DataLoader):
        raise LoaderContractError(
            f"{role} must be a torch.utils.data.DataLoader, but got {type(loader).__name__}"
        )
    if isinstance(loader.dataset, IterableDataset):
        raise LoaderContractError(
            f"{role} wraps an IterableDataset ({type(loader.dataset).__name__}); filial needs a "
            "map-style dataset (with __len__ and __getitem__) so that every cached target belongs "
            "to one sample index. Wrap your data in a map-style Dataset."
        )
    if loader.batch_sampler is None:
        raise LoaderContractError(
            f"{role} was built with batch_size=None (no automatic batching); filial needs batches "
            "of samples. Pass batch_size=... or a batch_sampler."
        )
    try:
        size = len(loader.dataset)  # type: ignore[arg-type]
    except TypeError as exc:
        raise LoaderContractError(f"{role}'s dataset has no __len__; filial needs one") from exc
    if size == 0:
        raise LoaderContractError(f"{role}'s dataset is empty; it needs at least one sample")
    return loader


def split_pair(batch: Any) -> tuple[Any, Any]:
    """Return ``(inputs, labels)`` from a collated batch, or raise the contract error."""
    if isinstance(batch, (tuple, list)) and len(batch) == 2:
        return batch[0], batch[1]
    if isinstance(batch, (tuple, list)):
        found = f"a {type(batch).__name__} of {len(batch)} items"
    else:
        found = f"a {type(batch).__name__}"
    raise LoaderContractError(f"{_PAIR_CONTRACT} The batch was {found}.")


_MASK64 = (1 << 64) - 1


def _mix(z: int) -> int:
    """The SplitMix64 finaliser of ``z`` + the golden-ratio increment (64-bit).

    The first two outputs of SplitMix64 started from state 0; the values are pinned here and
    checked against an outside implementation, OpenJDK's ``java.util.SplittableRandom`` (whose
    ``nextLong`` is this finaliser over the same increment), in ``tests/test_views.py``:

    >>> hex(_mix(0)), hex(_mix(0x9E3779B97F4A7C15))
    ('0xe220a8397b1dcdaf', '0x6e789e6aa1b965f4')
    """
    z = (z + 0x9E3779B97F4A7C15) & _MASK64
    z = ((z ^ (z >> 30)) * 0xBF58476D1CE4E5B9) & _MASK64
    z = ((z ^ (z >> 27)) * 0x94D049BB133111EB) & _MASK64
    return z ^ (z >> 31)


_GOLDEN = np.uint64(0x9E3779B97F4A7C15)


def _mix_array(z: np.ndarray) -> np.ndarray:
    """:func:`_mix` over a uint64 array (numpy's unsigned array arithmetic wraps mod 2**64)."""
    z = z + _GOLDEN
    z = (z ^ (z >> np.uint64(30))) * np.uint64(0xBF58476D1CE4E5B9)
    z = (z ^ (z >> np.uint64(27))) * np.uint64(0x94D049BB133111EB)
    return z ^ (z >> np.uint64(31))


@dataclass(frozen=True)
class Replay:
    """Fetch sample ``i`` in view ``v`` under generators seeded from ``(seed, i, v)``.

    >>> Replay(seed=7, views=3).decode([0, 4, 8])
    ([0, 1, 2], [0, 1, 2])
    """

    seed: int
    views: int
    # Which of Python's and numpy's generators the dataset was seen drawing from, in this
    # process (see _replayed): learnt as batches are fetched, never part of the replay's value.
    draws: list[bool] = field(
        default_factory=lambda: [False, False], compare=False, repr=False, hash=False
    )

    def seed_of(self, index: int, view: int) -> int:
        """The 31-bit seed of sample ``index`` in ``view``, through two rounds of the SplitMix64
        finaliser (Steele, Lea and Flood 2014, "Fast splittable pseudorandom number
        generators"): a few integer operations per sample where a SeedSequence costs ~20 us.
        It does not depend on ``views``: view 0 of a sample is the same in every run of a seed.

        >>> Replay(seed=7, views=3).seed_of(5, 0) == Replay(seed=7, views=1).seed_of(5, 0)
        True
        """
        return _mix(_mix(self.seed * 0x9E3779B97F4A7C15 + index) + view) >> 33

    def seeds_of(self, indices: Sequence[int], views: Sequence[int]) -> list[int]:
        """:meth:`seed_of` of every ``(indices[k], views[k])``, computed for the whole batch at
        once (the same values: a test compares them).

        >>> Replay(seed=7, views=3).seeds_of([5, 0], [0, 2]) == [
        ...     Replay(7, 3).seed_of(5, 0), Replay(7, 3).seed_of(0, 2)]
        True
        """
        base = np.uint64((self.seed * 0x9E3779B97F4A7C15) & _MASK64)
        z = _mix_array(np.asarray(indices, dtype=np.uint64) + base)
        z = _mix_array(z + np.asarray(views, dtype=np.uint64))
        return [int(s) for s in (z >> np.uint64(33)).tolist()]

    def decode(self, codes: Sequence[int]) -> tuple[list[int], list[int]]:
        """Split batch-sampler codes ``i * views + v`` into sample indices and views."""
        pairs = [divmod(int(code), self.views) for code in codes]
        return [i for i, _ in pairs], [v for _, v in pairs]


def code_count(dataset: Any, replay: Replay | None) -> int:
    """How many (sample, view) codes a pass over ``dataset`` covers: ``len * views``."""
    return len(dataset) * (replay.views if replay is not None else 1)


class _Fetched:
    """A batch's samples with their dataset indices (and views), on their way to
    :class:`IndexedCollate`. ``codes`` are what the batch sampler gave."""

    __slots__ = ("codes", "indices", "samples", "views")

    def __init__(
        self,
        indices: Sequence[int],
        samples: Sequence[Any],
        views: Sequence[int] | None = None,
        codes: Sequence[int] | None = None,
    ) -> None:
        self.indices = indices
        self.samples = samples
        self.views = views
        self.codes = indices if codes is None else codes


class IndexedDataset(Dataset):
    """The user's map-style dataset, fetching whole batches together with their indices.

    With a :class:`Replay` the indices it is given are codes ``i * views + v`` and every sample is
    fetched under its own seeds.
    """

    def __init__(self, dataset: Dataset, replay: Replay | None = None) -> None:
        object.__setattr__(self, "_filial_wrapped", dataset)
        object.__setattr__(self, "_filial_replay", replay)

    # Note: transparent attributes. A worker_init_fn configures its worker's copy through
    # get_worker_info().dataset, which is this wrapper: reads and writes of any other name go
    # to the user's dataset (which may itself have a ``dataset`` attribute, e.g. a Subset).
    def __getattr__(self, name: str) -> Any:
        if name.startswith("_filial_"):  # not set yet (while unpickling): no recursion
            raise AttributeError(name)
        return getattr(self._filial_wrapped, name)

    def __setattr__(self, name: str, value: Any) -> None:
        setattr(self._filial_wrapped, name, value)

    def __delattr__(self, name: str) -> None:
        delattr(self._filial_wrapped, name)

    def __len__(self) -> int:
        return len(self._filial_wrapped)

    def __getitem__(self, index: int) -> Any:
        return self._filial_wrapped[index]

    def __getitems__(self, indices: Sequence[int]) -> _Fetched:
        dataset = self._filial_wrapped
        replay: Replay | None = self._filial_replay
        if replay is None:
            inner = getattr(dataset, "__getitems__", None)
            samples = inner(indices) if inner else [dataset[i] for i in indices]
            return _Fetched(indices, samples)
        samples_at, views = replay.decode(indices)
        seeds = replay.seeds_of(samples_at, views)
        with preserved_rng():
            samples = _replayed(dataset, samples_at, seeds, replay.draws)
        return _Fetched(samples_at, samples, views, codes=indices)


def _numpy_state_is(state: Any) -> bool:
    now: Any = np.random.get_state()
    return bool(now[0] == state[0] and np.array_equal(now[1], state[1]) and now[2:] == state[2:])


def _replayed(dataset: Any, indices: list[int], seeds: list[int], draws: list[bool]) -> list[Any]:
    """``dataset[i]`` for every ``i`` of ``indices``, each fetched right after seeding the
    global generators from its seed (inside the caller's fork of them).

    Note: replaying augmentation. Each sample is fetched right after seeding torch's,
    Python's and numpy's global generators from (seed, i, v), so whatever random crop or flip
    the dataset draws is the same in the teacher pass and in every student epoch, in any
    worker. One fork per batch (not per sample) keeps the caller's streams where they were:
    dropout, initialisation and the user's samplers draw exactly as without replay.

    Note: cheaper seeding. Seeding Python's and numpy's generators costs ~4-6 us a sample
    each, more than many samples' augmentation, and most datasets (torchvision's transforms)
    draw from torch's alone. A generator the fetches do not draw from cannot change a sample,
    so those two are seeded only once the dataset has been seen drawing from them (``draws``,
    kept with the replay): until then their states are compared before and after the batch,
    and a batch that moved one is fetched again with it seeded for every sample. The samples
    are those of seeding all three every time, whatever the dataset does; only the cost
    differs (one batch fetched twice, per process, for a dataset that uses them).
    """
    python, numpy_ = draws
    py_state = None if python else random.getstate()
    np_state = None if numpy_ else np.random.get_state()
    samples = []
    torch_seed = torch.default_generator.manual_seed
    for i, seed in zip(indices, seeds, strict=True):
        torch_seed(seed)  # as seed_globals(seed, accelerators=False) does, generator by generator
        if python:
            random.seed(seed)
        if numpy_:
            np.random.seed(seed)
        samples.append(dataset[i])
    moved_py = py_state is not None and random.getstate() != py_state
    moved_np = np_state is not None and not _numpy_state_is(np_state)
    if not (moved_py or moved_np):
        return samples
    draws[0], draws[1] = python or moved_py, numpy_ or moved_np
    return _replayed(dataset, indices, seeds, draws)


class ViewChoice:
    """The user's batch sampler, with one of ``views`` views drawn for every sample it yields.

    Yields codes ``i * views + v``. The views come from a private generator seeded from ``seed``
    and the epoch (counted by iterations), so a student sees a new mix of views every epoch and
    the user's generators do not move.
    """

    def __init__(self, batch_sampler: Any, views: int, seed: int) -> None:
        self.batch_sampler = batch_sampler
        self.views = views
        self.seed = seed
        self.epoch = 0

    def __len__(self) -> int:
        return len(self.batch_sampler)

    def __getattr__(self, name: str) -> Any:
        if name == "batch_sampler":
            raise AttributeError(name)
        return getattr(self.batch_sampler, name)

    def __iter__(self) -> Iterator[list[int]]:
        generator = torch.Generator().manual_seed(derive_seed(self.seed, self.epoch))
        self.epoch += 1
        views = self.views
        for batch in self.batch_sampler:
            chosen = torch.randint(views, (len(batch),), generator=generator).tolist()
            yield [int(i) * views + v for i, v in zip(batch, chosen, strict=True)]


class IndexedCollate:
    """Collate with the user's function, then attach targets from a store, or the indices.

    Yields ``(inputs, labels, targets)`` when built with a store (``targets`` None without one),
    or ``(indices, inputs, labels)`` with ``keep_indices=True`` (for the teacher pass; the
    indices as a list of ints, since building a tensor of them costs more than reading them).
    """

    def __init__(
        self, collate_fn: Any, store: TargetStore | None = None, keep_indices: bool = False
    ) -> None:
        self.collate_fn = collate_fn
        self.store = store
        self.keep_indices = keep_indices

    def __call__(self, fetched: Any) -> tuple[Any, Any, Any]:
        if not isinstance(fetched, _Fetched):  # a sampler bypassed __getitems__
            raise LoaderContractError(
                "the wrapped dataset was indexed one sample at a time; filial needs automatic "
                "batching (batch_size or batch_sampler) on the loader"
            )
        inputs, labels = split_pair(self.collate_fn(fetched.samples))
        if self.keep_indices:
            return list(fetched.codes), inputs, labels
        if self.store is None:
            return inputs, labels, None
        return inputs, labels, gathered_targets(self.store, fetched)


def gathered_targets(store: TargetStore, fetched: _Fetched) -> Any:
    """The store's rows of a fetched batch (its samples, in their views), as tensors: one
    vectorised gather; a top-k store gives :class:`TopKTargets` (the k values, their classes)."""
    views = None if fetched.views is None else np.asarray(fetched.views, dtype=np.int64)
    rows = store.gather(np.asarray(fetched.indices, dtype=np.int64), views)
    if isinstance(rows, tuple):
        return TopKTargets(torch.from_numpy(rows[0]), torch.from_numpy(rows[1]))
    return torch.from_numpy(rows)


def _common_settings(loader: DataLoader) -> dict[str, Any]:
    settings: dict[str, Any] = {
        "num_workers": loader.num_workers,
        "pin_memory": loader.pin_memory,
        "timeout": loader.timeout,
        "worker_init_fn": loader.worker_init_fn,
        "multiprocessing_context": loader.multiprocessing_context,
    }
    if loader.num_workers > 0:
        settings["prefetch_factor"] = loader.prefetch_factor
    for name in ("pin_memory_device", "in_order"):
        if name in _LOADER_PARAMS and hasattr(loader, name):
            settings[name] = getattr(loader, name)
    return settings


class EpochLoader(DataLoader):
    """A DataLoader that calls ``set_epoch(k)`` on the user's sampler before its k-th pass.

    Note: epochs of a DistributedSampler. It shuffles with ``seed + epoch`` and keeps the same
    order until it is told the epoch before every pass (torch docs, DistributedSampler), which a
    plain distributed loop does by hand. The epoch here is explicit and counted: the number of
    passes (``iter`` calls) over this loader so far, from 0 in every generation, since
    ``gen.loader`` is built afresh for each one; the lineage gives the sampler a seed of the
    generation's own, so generations see different orders. A partial pass counts as one.
    """

    def __init__(self, *args: Any, epoch_sampler: Any, **kwargs: Any) -> None:
        super().__init__(*args, **kwargs)
        self.epoch_sampler = epoch_sampler
        self.epoch = 0  # the epoch of the next pass

    def __iter__(self) -> Any:
        self.epoch_sampler.set_epoch(self.epoch)
        self.epoch += 1
        return super().__iter__()


def epoch_sampler(loader: DataLoader) -> Any:
    """The user's batch sampler or sampler that takes ``set_epoch`` (e.g. a DistributedSampler)."""
    for candidate in samplers_of(loader):
        if callable(getattr(candidate, "set_epoch", None)):
            return candidate
    return None


def training_loader(
    loader: DataLoader,
    store: TargetStore | None,
    replay: Replay | None = None,
    choice_seed: int = 0,
) -> DataLoader:
    """The user's loader, rebuilt to yield ``(inputs, labels, targets)``.

    It keeps the user's batch sampler (so shuffling, custom samplers and ``drop_last`` behave and
    draw random numbers exactly as before), generator, workers and collate function. With a
    ``replay`` the samples are fetched in replayed views; with several views, one is drawn per
    sample and epoch (:class:`ViewChoice`, seeded from ``choice_seed``). A sampler with
    ``set_epoch`` (DistributedSampler) is told the epoch before every pass (:class:`EpochLoader`).
    """
    check_loader(loader, "train_loader")
    epochs = epoch_sampler(loader)  # found on the user's loader, before any wrapping
    extra = {} if epochs is None else {"epoch_sampler": epochs}
    batch_sampler = loader.batch_sampler
    if replay is not None and replay.views > 1:
        batch_sampler = ViewChoice(batch_sampler, replay.views, choice_seed)
    return (DataLoader if epochs is None else EpochLoader)(
        IndexedDataset(loader.dataset, replay),
        batch_sampler=batch_sampler,
        collate_fn=IndexedCollate(loader.collate_fn, store),
        generator=loader.generator,
        persistent_workers=loader.persistent_workers,
        **_common_settings(loader),
        **extra,
    )


def sharded_loader(loader: DataLoader, world: int, rank: int) -> DataLoader:
    """A training ``loader`` built for one process, as rank ``rank``'s share of ``world``.

    The loader gets a ``DistributedSampler`` over its dataset (shuffled when the loader
    shuffled; its ``seed`` is set per generation by the lineage) and ``batch_size // world``
    samples per batch, so that one step of all ranks together still sees the loader's batch;
    everything else (workers, collate_fn, pinning, ``drop_last``) is kept. A loader that
    shards already is returned as it is. Only plain loaders (``batch_size`` with or without
    ``shuffle``) can be sharded this way; others raise :class:`LoaderContractError`.
    """
    if any(isinstance(s, DistributedSampler) for s in samplers_of(loader)):
        return loader
    sampler = loader.sampler
    plain = type(loader.batch_sampler) is BatchSampler and (
        type(sampler) is SequentialSampler
        or (
            type(sampler) is RandomSampler
            and not sampler.replacement
            and sampler._num_samples is None
        )
    )
    batch = loader.batch_size
    if not plain or batch is None:
        raise LoaderContractError(
            "under a process group the training loader needs a DistributedSampler; filial can "
            "add one to a loader built with batch_size (and shuffle), but this one has a "
            f"{type(loader.batch_sampler).__name__} over a {type(sampler).__name__}. Give the "
            "loader a torch.utils.data.DistributedSampler yourself"
        )
    if batch % world:
        raise LoaderContractError(
            f"the training loader's batch_size ({batch}) is the batch of one step over all "
            f"{world} processes, so it should be a multiple of {world}, but got "
            f"batch_size={batch}"
        )
    shard: DistributedSampler[Any] = DistributedSampler(
        loader.dataset,
        num_replicas=world,
        rank=rank,
        shuffle=type(sampler) is RandomSampler,
        seed=0,
    )
    return DataLoader(
        loader.dataset,
        batch_size=batch // world,
        sampler=shard,
        drop_last=loader.drop_last,
        collate_fn=loader.collate_fn,
        generator=loader.generator,
        persistent_workers=loader.persistent_workers,
        **_common_settings(loader),
    )


def batch_size_of(loader: DataLoader, default: int = 256) -> int:
    if loader.batch_size is not None:
        return int(loader.batch_size)
    size = getattr(loader.batch_sampler, "batch_size", None)
    return int(size) if isinstance(size, int) and size > 0 else default


def sequential_loader(
    loader: DataLoader, seed: int, replay: Replay | None = None, sampler: Sampler | None = None
) -> DataLoader:
    """The user's loader over the same dataset in index order, yielding ``(indices, x, y)``.

    Used for the teacher pass and evaluations: every sample once, in a fixed order, whatever the
    user's sampler does. A private generator seeds the workers, so building it draws nothing from
    the user's global random state. With a ``replay`` it goes over every (sample, view) in the
    order of their codes ``i * views + v``, and the indices it yields are those codes.
    ``sampler`` (a process group's shard of those codes, in order) replaces the whole range.
    """
    generator = torch.Generator()
    generator.manual_seed(seed)
    settings = _common_settings(loader)
    if "in_order" in settings:
        settings["in_order"] = True  # the passes fill their buffers in index order
    count = code_count(loader.dataset, replay)
    return DataLoader(
        IndexedDataset(loader.dataset, replay),
        batch_sampler=BatchSampler(
            SequentialSampler(range(count)) if sampler is None else sampler,
            batch_size_of(loader),
            drop_last=False,
        ),
        collate_fn=IndexedCollate(loader.collate_fn, keep_indices=True),
        generator=generator,
        **settings,
    )

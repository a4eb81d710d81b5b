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
"""

from __future__ import annotations

import contextlib
import hashlib
import inspect
import random
from collections.abc import Iterator, Sequence
from dataclasses import dataclass
from typing import Any

import numpy as np
import torch
from torch.utils.data import DataLoader, Dataset, IterableDataset

from .errors import InputError
from .losses import TopKTargets
from .store import TargetStore

_LOADER_PARAMS = set(inspect.signature(DataLoader.__init__).parameters)


def derive_seed(*parts: int) -> int:
    """A 31-bit seed derived from integers, e.g. ``derive_seed(run_seed, generation)``.

    >>> derive_seed(0, 1) == derive_seed(0, 1) != derive_seed(0, 2)
    True
    """
    return int(np.random.SeedSequence([int(p) for p in parts]).generate_state(1)[0] >> 1)


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
        size = len(loader.dataset)
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


class _Fetched:
    """A batch's samples with their dataset indices, on their way to :class:`IndexedCollate`."""

    __slots__ = ("indices", "samples")

    def __init__(self, indices: Sequence[int], samples: Sequence[Any]) -> None:
        self.indices = indices
        self.samples = samples


class IndexedDataset(Dataset):
    """The user's map-style dataset, fetching whole batches together with their indices."""

    def __init__(self, dataset: Dataset) -> None:
        object.__setattr__(self, "_filial_wrapped", dataset)

    # Note: transparent attributes. A worker_init_fn configures its worker's copy through
    # get_worker_info().dataset, which is this wrapper: reads and writes of any other name go
    # to the user's dataset (which may itself have a ``dataset`` attribute, e.g. a Subset).
    def __getattr__(self, name: str) -> Any:
        if name == "_filial_wrapped":  # not set yet (while unpickling): no recursion
            raise AttributeError(name)
        return getattr(self._filial_wrapped, name)

    def __setattr__(self, name: str, value: Any) -> None:
        setattr(self._filial_wrapped, name, value)

    def __delattr__(self, name: str) -> None:
        delattr(self._filial_wrapped, name)

    def __len__(self) -> int:
        return len(self._filial_wrapped)  # type: ignore[arg-type]

    def __getitem__(self, index: int) -> Any:
        return self._filial_wrapped[index]

    def __getitems__(self, indices: Sequence[int]) -> _Fetched:
        dataset = self._filial_wrapped
        inner = getattr(dataset, "__getitems__", None)
        samples = inner(indices) if inner else [dataset[i] for i in indices]
        return _Fetched(indices, samples)


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

    def __call__(self, fetched: _Fetched) -> tuple[Any, Any, Any]:
        if not isinstance(fetched, _Fetched):  # a sampler bypassed __getitems__
            raise LoaderContractError(
                "the wrapped dataset was indexed one sample at a time; filial needs automatic "
                "batching (batch_size or batch_sampler) on the loader"
            )
        inputs, labels = split_pair(self.collate_fn(fetched.samples))
        if self.keep_indices:
            return list(fetched.indices), inputs, labels
        if self.store is None:
            return inputs, labels, None
        rows = self.store.gather(np.asarray(fetched.indices, dtype=np.int64))
        if isinstance(rows, tuple):  # a top-k store: the k values and their classes
            return inputs, labels, TopKTargets(torch.from_numpy(rows[0]), torch.from_numpy(rows[1]))
        return inputs, labels, torch.from_numpy(rows)


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


def training_loader(loader: DataLoader, store: TargetStore | None) -> DataLoader:
    """The user's loader, rebuilt to yield ``(inputs, labels, targets)``.

    It keeps the user's batch sampler (so shuffling, custom samplers and ``drop_last`` behave and
    draw random numbers exactly as before), generator, workers and collate function.
    """
    check_loader(loader, "train_loader")
    return DataLoader(
        IndexedDataset(loader.dataset),
        batch_sampler=loader.batch_sampler,
        collate_fn=IndexedCollate(loader.collate_fn, store),
        generator=loader.generator,
        persistent_workers=loader.persistent_workers,
        **_common_settings(loader),
    )


def batch_size_of(loader: DataLoader, default: int = 256) -> int:
    if loader.batch_size is not None:
        return int(loader.batch_size)
    size = getattr(loader.batch_sampler, "batch_size", None)
    return int(size) if isinstance(size, int) and size > 0 else default


def sequential_loader(loader: DataLoader, seed: int) -> DataLoader:
    """The user's loader over the same dataset in index order, yielding ``(indices, x, y)``.

    Used for the teacher pass and evaluations: every sample once, in a fixed order, whatever the
    user's sampler does. A private generator seeds the workers, so building it draws nothing from
    the user's global random state.
    """
    generator = torch.Generator()
    generator.manual_seed(seed)
    settings = _common_settings(loader)
    if "in_order" in settings:
        settings["in_order"] = True  # the passes fill their buffers in index order
    return DataLoader(
        IndexedDataset(loader.dataset),
        batch_size=batch_size_of(loader),
        shuffle=False,
        drop_last=False,
        collate_fn=IndexedCollate(loader.collate_fn, keep_indices=True),
        generator=generator,
        **settings,
    )


@contextlib.contextmanager
def preserved_rng() -> Iterator[None]:
    """Run a block without moving torch's, Python's or numpy's global generators.

    CUDA generators are forked too once CUDA is in use (never initialising it otherwise).
    """
    py_state, np_state = random.getstate(), np.random.get_state()
    devices = list(range(torch.cuda.device_count())) if torch.cuda.is_initialized() else []
    try:
        with torch.random.fork_rng(devices=devices):
            yield
    finally:
        random.setstate(py_state)
        np.random.set_state(np_state)


def _tensor_bytes(value: Any, digest: Any) -> None:
    """Feed every tensor or array in (nested lists, tuples, dicts of) ``value`` to ``digest``."""
    if isinstance(value, torch.Tensor):
        digest.update(str(value.dtype).encode() + str(tuple(value.shape)).encode())
        digest.update(value.detach().cpu().contiguous().numpy().tobytes())
    elif isinstance(value, np.ndarray):
        digest.update(value.dtype.str.encode() + str(value.shape).encode() + value.tobytes())
    elif isinstance(value, (list, tuple)):
        for item in value:
            _tensor_bytes(item, digest)
    elif isinstance(value, dict):
        for key in sorted(value, key=str):
            digest.update(str(key).encode())
            _tensor_bytes(value[key], digest)
    else:
        digest.update(repr(value).encode())


@dataclass(frozen=True)
class Probe:
    """What a few spread-out samples of a loader's dataset tell before any training."""

    fingerprint: str
    inputs: Any  # the probe samples' inputs and labels, collated by the user's collate_fn
    labels: Any
    deterministic: bool  # the same index gave the same inputs twice


def probe(loader: DataLoader, probes: int = 64) -> Probe:
    """Fingerprint a loader's dataset from its length and up to ``probes`` spread-out samples.

    The samples are fetched with torch's, Python's and numpy's generators seeded to 0 (inside a
    fork, so the caller's streams do not move), which makes common random augmentation
    repeatable. Inputs enter the fingerprint only when a second fetch gives the same bytes; a
    dataset that still changes (its own private random state) is fingerprinted by its labels.
    """
    dataset = loader.dataset
    size = len(dataset)
    indices = sorted({int(i) for i in np.linspace(0, size - 1, num=min(probes, size))})

    def fetch(chosen: list[int]) -> tuple[Any, Any]:
        torch.manual_seed(0)
        random.seed(0)
        np.random.seed(0)
        return split_pair(loader.collate_fn([dataset[i] for i in chosen]))

    with preserved_rng():
        inputs, labels = fetch(indices)
        again, _ = fetch(indices)
    first_digest, again_digest = hashlib.sha256(), hashlib.sha256()
    _tensor_bytes(inputs, first_digest)
    _tensor_bytes(again, again_digest)
    deterministic = first_digest.digest() == again_digest.digest()
    digest = hashlib.sha256(f"n={size};probes={len(indices)}".encode())
    _tensor_bytes(labels, digest)
    if deterministic:
        digest.update(first_digest.digest())
    return Probe(digest.hexdigest(), inputs, labels, deterministic)


def fingerprint(loader: DataLoader, probes: int = 64) -> str:
    """The :func:`probe` fingerprint of a loader's dataset."""
    return probe(loader, probes).fingerprint

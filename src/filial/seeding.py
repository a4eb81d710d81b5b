"""Where every random stream of a lineage comes from.

A lineage draws all its randomness from its ``seed`` and the generation's index, through
:func:`derive_seed`, one named stream per use, so that identical settings give identical runs and
a resumed generation repeats the one that was interrupted:

``generation_seed(seed, g)``
    torch's, Python's and numpy's global generators at the start of generation ``g`` (model
    initialisation, dropout, the user's own code).
``stream_seed(seed, Stream.PASSES, g)``
    the worker seeds of generation ``g``'s evaluation and teacher passes.
``stream_seed(seed, Stream.SHUFFLE, g)``
    the generators of the user's training loader and sampler, and a DistributedSampler's
    ``seed``, during generation ``g``.
``stream_seed(seed, Stream.VIEWS, g)``
    which replayed view each sample shows in each epoch of generation ``g``.
``replay_seed(seed)``
    the base of every replayed (sample, view) seed: the same in every generation, so a view's
    input never changes.

The values of these streams are part of a run's identity: changing one changes the results of
every existing run directory, so the stream numbers below are fixed.

>>> generation_seed(0, 1) == derive_seed(0, 1) != generation_seed(0, 2)
True
"""

from __future__ import annotations

import contextlib
import random
from collections.abc import Iterator
from enum import IntEnum
from typing import Any

import numpy as np
import torch
from torch.utils.data import DataLoader, DistributedSampler


class Stream(IntEnum):
    """The third part of :func:`derive_seed` for each stream of a generation (fixed forever)."""

    PASSES = 1
    SHUFFLE = 2
    REPLAY = 3  # used without a generation index: derive_seed(seed, 3)
    VIEWS = 4


def derive_seed(*parts: int) -> int:
    """A 31-bit seed derived from integers, e.g. ``derive_seed(run_seed, generation)``.

    >>> derive_seed(0, 1) == derive_seed(0, 1) != derive_seed(0, 2)
    True
    """
    return int(np.random.SeedSequence([int(p) for p in parts]).generate_state(1)[0] >> 1)


def generation_seed(seed: int, generation: int) -> int:
    """The seed of the global generators at the start of ``generation``."""
    return derive_seed(seed, generation)


def stream_seed(seed: int, stream: Stream, generation: int) -> int:
    """The seed of one of ``generation``'s own streams (see the table above)."""
    return derive_seed(seed, generation, int(stream))


def replay_seed(seed: int) -> int:
    """The base seed of replayed views (one for the whole lineage)."""
    return derive_seed(seed, int(Stream.REPLAY))


def seed_globals(seed: int, *, accelerators: bool = True) -> None:
    """Seed torch's, Python's and numpy's global generators.

    ``accelerators=False`` seeds torch's CPU generator only: ``torch.manual_seed`` also visits
    every accelerator's generators and costs ~0.2 ms, more than many samples' whole augmentation,
    and datasets augment on the CPU (the replayed fetch of every sample takes this path).
    """
    if accelerators:
        torch.manual_seed(seed)
    else:
        torch.default_generator.manual_seed(seed)
    random.seed(seed)
    np.random.seed(seed)


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


def samplers_of(loader: DataLoader) -> list[Any]:
    """The loader's batch sampler, the sampler inside it and the loader's sampler, each once
    (``batch_sampler`` first: a batch sampler of the user's own may take ``set_epoch``)."""
    batch_sampler = loader.batch_sampler
    found = (batch_sampler, getattr(batch_sampler, "sampler", None), loader.sampler)
    return list({id(s): s for s in found if s is not None}.values())


def seed_generation(seed: int, generation: int, train_loader: DataLoader) -> None:
    """Seed every random stream ``generation`` draws from, from ``(seed, generation)``.

    Besides torch's, Python's and numpy's global generators this reseeds the generators that
    the user's training loader and its sampler hold, so that the generation sees the same
    shuffling whether the run went straight through or was resumed in a new process.
    """
    seed_globals(generation_seed(seed, generation))
    shuffle = stream_seed(seed, Stream.SHUFFLE, generation)
    samplers = samplers_of(train_loader)
    candidates = [train_loader.generator] + [getattr(s, "generator", None) for s in samplers]
    for generator in {id(g): g for g in candidates}.values():
        if isinstance(generator, torch.Generator):
            generator.manual_seed(shuffle)
    # Note: DistributedSampler holds no generator; it shuffles with seed + epoch. Its seed is
    # derived here per generation (the same on every rank, so the shards stay complementary):
    # generations see different orders and a resumed run repeats them.
    for sampler in samplers:
        if isinstance(sampler, DistributedSampler):
            sampler.seed = shuffle

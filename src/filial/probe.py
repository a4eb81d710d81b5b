"""What a few samples of the user's data tell before any training, and the warnings they earn.

:func:`probe` fetches a few spread-out samples of a loader's dataset and returns a :class:`Probe`:
a fingerprint (a resumed run must see the same data), the collated inputs and labels (the model
and the labels are checked on them before anything is written), and whether the samples change
with the random seeds (random augmentation, which the students' cached targets must replay).
:func:`replay_for` decides from it whether a lineage replays views; :func:`check_augmentation`
refuses what cannot be replayed and says once per dataset what a single view means.
"""

from __future__ import annotations

import hashlib
import logging
import random
from dataclasses import dataclass
from typing import Any

import numpy as np
import torch
from torch.utils.data import DataLoader

from . import distributed
from .data import Replay, split_pair
from .seeding import preserved_rng, replay_seed, seed_globals

log = logging.getLogger("filial")

# Warnings about a dataset already given in this process (once per dataset, not per lineage).
_AUGMENTATION_WARNED: set[str] = set()


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
    deterministic: bool  # the same index under the same seeds gave the same inputs twice
    varies: bool = False  # fetching drew from the global generators: random augmentation
    collate_draws: bool = False  # the collate_fn drew from them (after any replayed fetch)

    @property
    def replayable(self) -> bool:
        """Seeding the global generators before each fetch fixes the inputs a model sees."""
        return self.deterministic and not self.collate_draws

    @property
    def changes(self) -> bool:
        """The samples change from fetch to fetch (for whatever reason)."""
        return self.varies or self.collate_draws or not self.deterministic


def _global_states() -> tuple[Any, ...]:
    legacy: Any = np.random.get_state()
    return (torch.get_rng_state(), random.getstate(), legacy[1].copy(), legacy[2:])


def _moved(before: tuple[Any, ...], after: tuple[Any, ...]) -> bool:
    return not (
        torch.equal(before[0], after[0])
        and before[1] == after[1]
        and np.array_equal(before[2], after[2])
        and before[3] == after[3]
    )


def probe(loader: DataLoader, probes: int = 64) -> Probe:
    """Fingerprint a loader's dataset from its length and up to ``probes`` spread-out samples.

    The samples are fetched with torch's, Python's and numpy's generators seeded to 0 (inside a
    fork, so the caller's streams do not move), which makes common random augmentation
    repeatable. Inputs enter the fingerprint only when a second fetch gives the same bytes; a
    dataset that still changes (its own private random state) is fingerprinted by its labels.
    Whether fetching or collating draws from the global generators is read off their states, so
    augmentation applied to one sample in a thousand is seen as surely as one applied to all.
    """
    dataset = loader.dataset
    size = len(dataset)  # type: ignore[arg-type]
    indices = sorted({int(i) for i in np.linspace(0, size - 1, num=min(probes, size))})

    def fetch(seed: int) -> tuple[Any, Any, bool, bool]:
        seed_globals(seed, accelerators=False)
        before = _global_states()
        samples = [dataset[i] for i in indices]
        fetched = _global_states()
        inputs, labels = split_pair(loader.collate_fn(samples))
        return inputs, labels, _moved(before, fetched), _moved(fetched, _global_states())

    def digest_of(value: Any) -> Any:
        digest = hashlib.sha256()
        _tensor_bytes(value, digest)
        return digest

    with preserved_rng():
        inputs, labels, fetch_draws, collate_draws = fetch(0)
        again = fetch(0)[0]
        other = fetch(1)[0]
    first_digest = digest_of(inputs)
    deterministic = first_digest.digest() == digest_of(again).digest()
    varies = fetch_draws or first_digest.digest() != digest_of(other).digest()
    digest = hashlib.sha256(f"n={size};probes={len(indices)}".encode())
    _tensor_bytes(labels, digest)
    if deterministic:
        digest.update(first_digest.digest())
    return Probe(digest.hexdigest(), inputs, labels, deterministic, varies, collate_draws)


def fingerprint(loader: DataLoader, probes: int = 64) -> str:
    """The :func:`probe` fingerprint of a loader's dataset."""
    return probe(loader, probes).fingerprint


def replay_for(train: Probe, views: int, seed: int) -> Replay | None:
    """Replayed views when the training samples draw from the random streams (or several views
    are asked for); none for a deterministic dataset, which then costs no per-sample seeding."""
    if train.replayable and (views > 1 or train.varies):
        return Replay(replay_seed(seed), views)
    return None


def say_once(key: str, message: str) -> None:
    """A warning about the data, once per dataset in this process, and on rank 0 only."""
    if key not in _AUGMENTATION_WARNED and distributed.is_main():
        _AUGMENTATION_WARNED.add(key)
        log.warning("%s", message)


def warn_changing_heldout(heldout: Probe) -> None:
    if heldout.changes:
        say_once(
            "heldout:" + heldout.fingerprint,
            "the held-out samples change from fetch to fetch (random augmentation in the "
            "held-out dataset?), so held-out figures carry that noise too; build the "
            "held-out dataset without augmentation",
        )


def check_augmentation(train: Probe, views: int) -> None:
    """Refuse views that cannot be replayed; say once per dataset what a single view means."""
    if not train.replayable:
        if train.collate_draws:
            why = (
                "the collate_fn draws from the global random generators, after each sample's "
                "replayed fetch. Move that augmentation into the dataset's __getitem__, or use "
                "teacher_mode='online'."
            )
        else:
            why = (
                "the training samples change even under the same seeds (the dataset draws from "
                "a generator of its own, or from the CUDA generator). Draw augmentation on the "
                "CPU from the global generators, or use teacher_mode='online'."
            )
        if views > 1:
            raise ValueError(
                f"views={views} replays random augmentation by seeding torch's, Python's and "
                f"numpy's global generators before each sample is fetched, but {why}"
            )
        say_once(train.fingerprint, f"cached targets cannot match a student's inputs: {why}")
    elif not train.varies and views > 1:
        say_once(
            f"copies{views}:{train.fingerprint}",
            f"views={views}: the training samples do not change with the random seeds, so the "
            f"{views} views of a sample are the same input and the cache holds {views} copies of "
            "each target; views=1 gives the same training at a fraction of the teacher pass",
        )
    elif train.varies and views == 1:
        say_once(
            train.fingerprint,
            "the training samples change from fetch to fetch (random augmentation): with views=1 "
            "each student sees every sample in a single replayed augmented view, the one its "
            "cached target was made for. Pass views=4 (say) for more views per sample, or "
            "teacher_mode='online' for a fresh augmentation with an exact target every step.",
        )

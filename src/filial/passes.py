"""A model's pass over a whole loader, batch by batch, handed to a few consumers.

A teacher pass over the training set must hold nothing of the size of its outputs (N samples x
views x C outputs; 5 GB of float32 at ImageNet size with 1000 classes), so :func:`stream_pass`
keeps no rows itself: each batch goes to a short list of *consumers*, each keeping only what it
needs (the target store writes the rows to disk, the record's figures keep a few sums), and
each is asked for its result once the pass is over. Consumers are plain objects with three
methods (:class:`Consumer`):

``add(codes, outputs, labels)``
    once per batch, in the pass's order. ``codes`` (an int64 numpy array) names each row:
    ``i * views + v`` for sample ``i`` in replayed view ``v`` (``i`` itself without replay);
    under a process group they are this rank's share, with the sampler's padding rows already
    dropped, so every code reaches exactly one rank's consumers once. ``outputs`` is the
    ``(rows, C)`` float32 tensor on the model's device (keep a copy of what you need, never the
    tensor), ``labels`` the batch's labels on the CPU. A rank may get batches with no rows.
``result()``
    once after the pass, on every rank, in the order of the list, after the pass has checked
    that the ranks delivered every code exactly once. It may use collectives (every rank must
    then have the same consumers in the same order), and returns whatever the consumer made
    (e.g. sums over all ranks, or rank 0's share of the work).
``abandon()``
    instead of, or after, ``result()`` when the pass (or a later consumer's result) fails:
    remove temporaries, close files.

Example: a consumer that counts rows and sums the outputs of view 0 of every sample::

    class ViewZeroSum:
        def __init__(self, views):
            self.views, self.total = views, 0.0
        def add(self, codes, outputs, labels):
            first = torch.from_numpy(codes % self.views == 0).to(outputs.device)
            self.total = self.total + outputs[first].sum()  # stays on the device
        def result(self):
            return filial.distributed.all_sum([self.total])[0]
        def abandon(self):
            pass
"""

from __future__ import annotations

import contextlib
from collections.abc import Sequence
from typing import Any, Protocol

import numpy as np
import torch
from torch import nn
from torch.utils.data import DataLoader, DistributedSampler

from . import distributed
from .data import Replay, code_count
from .evaluation import scored_batches

_SHOWN = 5  # out-of-range codes named in a coverage error


class Consumer(Protocol):
    """What :func:`stream_pass` hands each batch to (see the module docstring)."""

    def add(self, codes: np.ndarray, outputs: torch.Tensor, labels: torch.Tensor) -> None: ...

    def result(self) -> Any: ...

    def abandon(self) -> None: ...


class _Coverage:
    """Which codes a pass delivered: in one process, each batch must continue where the last
    one stopped; under a process group, a count per code (one byte each), checked over all
    ranks at the end (:func:`filial.distributed.check_counts`). Drops the sampler's padding
    rows by position (:func:`filial.distributed.padding_rows`)."""

    def __init__(self, size: int, sampler: DistributedSampler | None) -> None:
        self.size = size
        self.next = 0  # one process: the next code expected; sharded: the next position
        # sharded: the sampler's positions from here on are padding (padding_rows, counted)
        self.padding = None if sampler is None else distributed.padding_start(sampler)
        self.counts = None if sampler is None else np.zeros(size, dtype=np.uint8)
        self.outside: list[int] = []
        self.outside_count = 0

    def kept(self, codes: list[int]) -> np.ndarray | None:
        """The positions of ``codes`` to keep (None: all of them)."""
        if self.padding is None:
            return None
        start, self.next = self.next, self.next + len(codes)
        if self.next <= self.padding:
            return None
        return np.arange(start, self.next) < self.padding

    def add(self, codes: np.ndarray) -> None:
        if self.counts is None:
            expected = np.arange(self.next, self.next + len(codes))
            if not np.array_equal(codes, expected):
                raise RuntimeError(
                    f"the pass's batch covers codes {codes[:3].tolist()}..., but the pass "
                    f"expected {expected[:3].tolist()}... (codes in order)"
                )
            self.next += len(codes)
            return
        inside = (codes >= 0) & (codes < self.size)
        if not inside.all():
            beyond = codes[~inside]
            self.outside_count += len(beyond)
            self.outside += beyond[: _SHOWN - len(self.outside)].tolist()
            codes = codes[inside]
        found, times = np.unique(codes, return_counts=True)
        # 2 stands for "more than once"; the counts stay one byte each.
        self.counts[found] = np.minimum(self.counts[found] + np.minimum(times, 2), 2)

    def check(self) -> None:
        if self.counts is None:
            if self.next != self.size:
                raise RuntimeError(f"the pass covered {self.next} of {self.size} codes")
            return
        distributed.check_counts(self.counts, (self.outside_count, self.outside))


def stream_pass(
    model: nn.Module,
    loader: DataLoader,
    seed: int,
    consumers: Sequence[Consumer],
    *,
    replay: Replay | None = None,
    fault: str | None = None,
) -> list[Any]:
    """Run ``model`` (eval mode, no gradients, the caller's random streams untouched) over
    ``loader``'s whole dataset in code order, every batch handed to each of ``consumers``;
    returns their results, in order.

    With a ``replay`` the pass covers every (sample, view) code ``i * views + v``. Under a
    process group each rank passes over its shard of the codes (torch's DistributedSampler in
    order), drops the sampler's padding rows by position, and the ranks check together that
    every code was delivered exactly once (a gap or a duplicate raises
    :class:`~filial.distributed.CoverageError` on every rank, rank 0 naming the codes) before
    any consumer is asked for its result. If anything fails, every consumer is abandoned.
    """
    size = code_count(loader.dataset, replay)
    sampler = distributed.shard_sampler(range(size)) if distributed.is_distributed() else None
    coverage = _Coverage(size, sampler)
    try:
        with contextlib.closing(
            scored_batches(model, loader, seed, fault, replay, sampler)
        ) as batches:
            for indices, out, labels in batches:
                codes = np.asarray(indices, dtype=np.int64)
                keep = coverage.kept(indices)
                if keep is not None:  # padding rows: repeats that another rank delivers
                    codes, labels = codes[keep], labels[torch.from_numpy(keep)]
                    out = out[torch.from_numpy(keep).to(out.device)]
                coverage.add(codes)
                out = out.float()
                for consumer in consumers:
                    consumer.add(codes, out, labels)
        coverage.check()
        return [consumer.result() for consumer in consumers]
    except BaseException:
        for consumer in consumers:
            consumer.abandon()
        raise

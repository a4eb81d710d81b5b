"""Several processes: rank, world size, barriers and the few collectives a lineage needs.

filial never starts a process group. When the user's script has initialised one
(``torch.distributed.init_process_group``, e.g. under ``torchrun``), a lineage runs on every rank:
each rank trains on its shard of the training set (the user's ``DistributedSampler``) and runs the
evaluation passes on its shard; :func:`gather_indexed` brings the shards' outputs to rank 0 with
tensor collectives (held-out and test sets, which are small), while the teacher pass over the
training set writes each rank's rows straight into the store and only counts per sample index
meet on rank 0 (:func:`check_counts`); rank 0 alone writes the run directory and decides, and
:func:`broadcast_ints` / :func:`on_rank_zero` tell the other ranks. Without a process group every
function here behaves as rank 0 of a world of one and sends nothing.

The run directory must be one that every rank sees (one machine, or a file system shared by the
machines): the other ranks read the target store and ``lineage.json`` that rank 0 wrote.

Collectives use the device the backend needs: CPU tensors for gloo (and mpi), the rank's CUDA
device for nccl (the model's device when it is a CUDA device, else ``torch.cuda.current_device()``,
which the user sets with ``torch.cuda.set_device(local_rank)``, as usual under nccl).

>>> rank(), world_size(), is_main()   # no process group here
(0, 1, True)
"""

from __future__ import annotations

import hashlib
import itertools
from collections.abc import Callable, Iterator, Sequence, Sized
from typing import TypeVar

import numpy as np
import torch
from torch import nn
from torch.utils.data import DistributedSampler

from .errors import InputError

T = TypeVar("T")
MAIN = 0  # the rank that writes and decides
_SHOWN = 5  # sample indices named in a coverage error


class CoverageError(RuntimeError):
    """An evaluation pass did not deliver every sample index exactly once."""


class RankZeroFailed(RuntimeError):
    """Rank 0 failed at a step the other ranks were waiting for; rank 0's output has the error."""


def is_distributed() -> bool:
    """True when torch.distributed is built in and a default process group is initialised."""
    return torch.distributed.is_available() and torch.distributed.is_initialized()


def rank() -> int:
    return torch.distributed.get_rank() if is_distributed() else 0


def world_size() -> int:
    return torch.distributed.get_world_size() if is_distributed() else 1


def is_main() -> bool:
    """True on rank 0, and in a single process."""
    return rank() == MAIN


def collective_device(preferred: torch.device | None = None) -> torch.device:
    """The device for tensors sent through the default group's backend.

    gloo and mpi take CPU tensors (and so does a mixed ``cpu:gloo,cuda:nccl`` backend); nccl
    takes CUDA tensors only: ``preferred`` when it is a CUDA device, else the current one.
    """
    cpu = torch.device("cpu")
    if not is_distributed():
        return cpu
    backend = str(torch.distributed.get_backend()).lower()
    if "gloo" in backend or "mpi" in backend:
        return cpu
    if preferred is not None and preferred.type != "cpu":
        return preferred
    if "nccl" in backend:
        return torch.device("cuda", torch.cuda.current_device())
    return cpu


def barrier() -> None:
    """Wait until every rank is here (an all-reduce of one number on the backend's device, so
    nccl needs no guess of the device)."""
    if is_distributed():
        torch.distributed.all_reduce(torch.zeros(1, device=collective_device()))


def broadcast_ints(values: Sequence[int] | None, length: int) -> list[int]:
    """Rank 0's ``values`` (``length`` integers, e.g. a stop decision) on every rank.

    Rank 0 passes the values; the others pass None and receive them (a tensor broadcast).
    """
    if not is_distributed():
        if values is None:
            raise ValueError("broadcast_ints needs the values in a single process")
        return [int(v) for v in values]
    if is_main():
        if values is None or len(values) != length:
            raise ValueError(f"rank 0 must send {length} integers, but got {values!r}")
        tensor = torch.tensor([int(v) for v in values], dtype=torch.int64)
    else:
        tensor = torch.zeros(length, dtype=torch.int64)
    tensor = tensor.to(collective_device())
    torch.distributed.broadcast(tensor, src=MAIN)
    return [int(v) for v in tensor.cpu().tolist()]


def on_rank_zero(work: Callable[[], T], what: str) -> T | None:
    """Run ``work`` on rank 0 alone while the other ranks wait for it; returns its result on
    rank 0 and None elsewhere. If it fails on rank 0, every other rank raises
    :class:`RankZeroFailed` naming ``what`` instead of waiting for a message that never comes."""
    return on_rank_zero_telling(work, what, lambda _: (), 0)[0]


def on_rank_zero_telling(
    work: Callable[[], T], what: str, tell: Callable[[T], Sequence[int]], length: int
) -> tuple[T | None, list[int]]:
    """:func:`on_rank_zero`, and every rank also receives ``tell(result)`` (``length``
    integers, e.g. a stop decision) in the same broadcast as the word that rank 0 succeeded."""
    if not is_distributed():
        result = work()
        return result, [int(v) for v in tell(result)]
    if is_main():
        try:
            result = work()
            told = [int(v) for v in tell(result)]
        except BaseException:
            broadcast_ints([0] * (length + 1), length + 1)
            raise
        broadcast_ints([1, *told], length + 1)
        return result, told
    ok, *told = broadcast_ints(None, length + 1)
    if not ok:
        raise RankZeroFailed(f"rank 0 failed while {what}; its error is in rank 0's output")
    return None, told


def all_sum(values: Sequence[float | torch.Tensor]) -> list[float]:
    """The sums over the ranks of a few numbers (float64, one all-reduce)."""
    if not is_distributed():
        return [float(v) for v in values]
    device = collective_device()
    tensor = torch.stack(
        [torch.as_tensor(v, dtype=torch.float64).to(device).reshape(()) for v in values]
    )
    torch.distributed.all_reduce(tensor)
    return [float(v) for v in tensor.cpu().tolist()]


def all_max(values: Sequence[float | torch.Tensor]) -> list[float]:
    """The largest over the ranks of each of a few numbers (float64, one all-reduce; NaN if
    any rank's is NaN)."""
    if not is_distributed():
        return [float(v) for v in values]
    device = collective_device()
    tensor = torch.stack(
        [torch.as_tensor(v, dtype=torch.float64).to(device).reshape(()) for v in values]
    )
    nan = torch.isnan(tensor).to(torch.float64)  # reductions need not propagate NaN
    both = torch.stack([tensor.nan_to_num(nan=-torch.inf), nan])
    torch.distributed.all_reduce(both, op=torch.distributed.ReduceOp.MAX)
    found = torch.where(both[1] > 0, torch.nan, both[0])
    return [float(v) for v in found.cpu().tolist()]


def sum_over_ranks(tensor: torch.Tensor) -> torch.Tensor:
    """The elementwise sum over the ranks of a small tensor (every rank passes one of the same
    shape), on the CPU; the tensor itself in a single process."""
    if not is_distributed():
        return tensor.cpu()
    sent = tensor.to(collective_device(tensor.device)).contiguous().clone()
    torch.distributed.all_reduce(sent)
    return sent.cpu()


def ranks_differing(text: str) -> list[int]:
    """The ranks whose ``text`` differs from rank 0's (compared by sha256, 32 bytes a rank)."""
    if not is_distributed():
        return []
    device = collective_device()
    digest = torch.tensor(list(hashlib.sha256(text.encode()).digest()), dtype=torch.uint8)
    gathered = [torch.empty_like(digest, device=device) for _ in range(world_size())]
    torch.distributed.all_gather(gathered, digest.to(device))
    return [r for r, other in enumerate(gathered) if not torch.equal(other, gathered[MAIN])]


def wrap(model: nn.Module) -> nn.Module:
    """``model`` in DistributedDataParallel under a process group (``device_ids`` only for a
    CUDA module); the module itself otherwise or when it is wrapped already."""
    if not is_distributed() or isinstance(model, nn.parallel.DistributedDataParallel):
        return model
    device = next((p.device for p in model.parameters()), torch.device("cpu"))
    device_ids = [device] if device.type == "cuda" else None
    return nn.parallel.DistributedDataParallel(model, device_ids=device_ids)


def align_replicas(model: nn.Module) -> None:
    """Check that every rank holds the same parameters; give every rank rank 0's (exactly) and
    its buffers.

    Note: replicas. The evaluation passes score each shard on its own rank, so the shards'
    outputs only belong together if every rank's model is the one rank 0 checkpoints.
    DistributedDataParallel keeps the parameters equal, but batch-norm statistics are updated on
    each rank from its own last batches and drift apart: rank 0's buffers are broadcast into the
    other ranks' copies. Parameters that differ mean the gradients were never averaged (the
    model was not wrapped in DistributedDataParallel), which no broadcast should paper over.
    """
    if not is_distributed():
        return
    params = [p.detach() for p in model.parameters()]
    if params:
        device = collective_device(params[0].device)
        sums = torch.stack(
            [
                torch.stack([p.double().sum() for p in params]).sum(),
                torch.stack([p.double().square().sum() for p in params]).sum(),
                torch.stack([p.double().abs().sum() for p in params]).sum(),
            ]
        ).to(device)
        gathered = [torch.empty_like(sums) for _ in range(world_size())]
        torch.distributed.all_gather(gathered, sums)
        reference = gathered[MAIN].cpu()
        tolerance = 1e-6 * max(float(reference[2]), 1.0)
        differing = [
            r
            for r, other in enumerate(gathered)
            if float((other.cpu() - reference).abs().max()) > tolerance
        ]
        if differing:
            raise InputError(
                f"the model's parameters on rank(s) {differing} differ from rank 0's after "
                "training: the ranks trained separate models. Wrap the student in "
                "torch.nn.parallel.DistributedDataParallel(gen.model) for training (or use "
                "filial.fit_epochs, which does it), so that every rank trains the same model."
            )
    with torch.no_grad():
        # The check above is coarse (sums of all parameters); rank 0's exact parameters are
        # sent as well, so every shard is scored by the very weights rank 0 checkpoints.
        for param in model.parameters():
            sent = param.detach().to(collective_device(param.device)).contiguous()
            torch.distributed.broadcast(sent, src=MAIN)
            param.copy_(sent.to(param.device, param.dtype))
        for buffer in model.buffers():
            sent = buffer.detach()
            if sent.dtype == torch.bool:
                sent = sent.to(torch.uint8)
            sent = sent.to(collective_device(buffer.device)).contiguous()
            torch.distributed.broadcast(sent, src=MAIN)
            buffer.copy_(sent.to(buffer.device, buffer.dtype))


class _InOrderShard(DistributedSampler):
    """torch's DistributedSampler without shuffling or dropping, giving the very same indices
    lazily: its own ``__iter__`` builds a Python list of every index of the dataset (about 36
    bytes an index: 180 MB for a pass over ImageNet's images in 4 views), this one counts."""

    def __iter__(self) -> Iterator[int]:
        size = len(self.dataset)  # type: ignore[arg-type]
        start = padding_start(self)
        # the rank's own positions, then DistributedSampler's padding: the list repeated from
        # its start, so global position g >= size holds index (g - size) % size
        padded = range(self.rank + start * self.num_replicas, self.total_size, self.num_replicas)
        return itertools.chain(
            range(self.rank, size, self.num_replicas), ((g - size) % size for g in padded)
        )


def shard_sampler(dataset: Sized) -> DistributedSampler:
    """This rank's share of ``dataset`` for an evaluation pass: torch's DistributedSampler in
    index order (no shuffling, no samples dropped; padded so that every rank has as many),
    yielding its indices without listing them all first."""
    return _InOrderShard(
        dataset,  # type: ignore[arg-type]
        num_replicas=world_size(),
        rank=rank(),
        shuffle=False,
        drop_last=False,
    )


def padding_start(sampler: DistributedSampler) -> int:
    """The first of ``sampler``'s positions that is padding (see :func:`padding_rows`): every
    position from there on is."""
    if sampler.drop_last:
        raise ValueError("a sampler that drops samples cannot cover the whole dataset")
    return len(range(sampler.rank, len(sampler.dataset), sampler.num_replicas))  # type: ignore[arg-type]


def padding_rows(sampler: DistributedSampler) -> torch.Tensor:
    """Which of ``sampler``'s positions are padding: repeats of samples that another position
    already holds, added so that every rank gets the same number.

    Note: duplicate indices from distributed padding. Without ``drop_last``, DistributedSampler
    extends the index list to ``total_size`` (a multiple of the world size) by repeating its
    first samples, then gives rank ``r`` positions ``r, r + W, r + 2W, ...``. The positions at
    or beyond the dataset's length are the repeats; they are known before the pass, so they are
    dropped by position rather than by guessing which of two equal indices is the spare.
    """
    return torch.arange(sampler.num_samples) >= padding_start(sampler)


def assemble(
    indices: Sequence[torch.Tensor], values: Sequence[Sequence[torch.Tensor]], size: int
) -> list[torch.Tensor]:
    """Put rows from several ranks in dataset order; each index in ``range(size)`` exactly once.

    ``indices[r]`` holds the sample index of every row that rank ``r`` sent (-1 for a row to
    drop: padding); ``values[k][r]`` holds those rows of the k-th tensor. Raises
    :class:`CoverageError` naming the indices that are missing, out of range or sent twice.

    >>> rows = assemble([torch.tensor([0, 2, -1]), torch.tensor([1])],
    ...                 [[torch.tensor([0., 2., 0.]), torch.tensor([1.])]], size=3)
    >>> rows[0].tolist()
    [0.0, 1.0, 2.0]
    """
    flat = torch.cat([i.to(torch.int64).cpu() for i in indices])
    keep = flat >= 0
    kept = flat[keep]
    outside = kept[kept >= size]
    kept = kept[kept < size]
    counts = torch.bincount(kept, minlength=size)
    missing = torch.nonzero(counts == 0).flatten()
    twice = torch.nonzero(counts > 1).flatten()
    problem = _coverage_problem(
        size,
        (len(outside), outside[:_SHOWN].tolist()),
        (len(missing), missing[:_SHOWN].tolist()),
        (len(twice), twice[:_SHOWN].tolist()),
    )
    if problem:
        raise CoverageError(problem)
    assembled = []
    for parts in values:
        rows = torch.cat([p.cpu() for p in parts])[keep]
        whole = torch.empty((size, *rows.shape[1:]), dtype=rows.dtype)
        whole[flat[keep]] = rows
        assembled.append(whole)
    return assembled


Found = tuple[int, Sequence[int]]  # how many indices, and the first few of them


def _some(found: Found) -> str:
    count, first = found
    shown = ", ".join(str(int(i)) for i in first[:_SHOWN])
    return shown + (", ..." if count > _SHOWN else "")


def _coverage_problem(size: int, outside: Found, missing: Found, twice: Found) -> str:
    """The coverage error's message ("" when every index in ``range(size)`` came once)."""
    problems = []
    if outside[0]:
        problems.append(f"{outside[0]} rows name indices beyond {size - 1}: {_some(outside)}")
    if missing[0]:
        problems.append(f"{missing[0]} of {size} sample indices are missing: {_some(missing)}")
    if twice[0]:
        problems.append(
            f"{twice[0]} sample indices arrived more than once (not as the sampler's "
            f"padding): {_some(twice)}"
        )
    if not problems:
        return ""
    return (
        "the evaluation pass did not cover the dataset exactly once, so no target can be "
        "trusted to belong to its sample: " + "; ".join(problems)
    )


_COUNT_CHUNK = 1 << 20  # indices per reduction when counts meet on rank 0 (4 MiB of int32)


def check_counts(counts: np.ndarray, outside: Found) -> None:
    """Check that the ranks' passes together delivered every index exactly once, from counts
    alone: ``counts[i]`` is how often this rank's pass delivered index ``i`` (its padding
    rows dropped; any small integer type, 2 standing for "more than once"), ``outside`` the
    rows that named an index beyond ``len(counts)``.

    The counts are summed onto rank 0 in chunks of ``_COUNT_CHUNK`` (so that no rank holds
    more than one chunk in a wider type), rank 0 names what is wrong, and every rank raises
    :class:`CoverageError` (a gap, a duplicate, an index out of range). In one process the
    counts are checked as they are.

    >>> check_counts(np.array([1, 1, 1], dtype=np.uint8), (0, []))
    >>> try:
    ...     check_counts(np.array([1, 0, 2], dtype=np.uint8), (0, []))
    ... except CoverageError as exc:
    ...     print(*str(exc).split("sample: ", 1)[1].split("; "), sep="\\n")
    1 of 3 sample indices are missing: 1
    1 sample indices arrived more than once (not as the sampler's padding): 2
    """
    size = len(counts)
    beyond = [int(sum_over_ranks(torch.tensor([int(outside[0])], dtype=torch.int64))[0])]
    examples = _first_outside(outside)
    missing: list[int] = []
    twice: list[int] = []
    totals = [0, 0]
    device = collective_device()
    for start in range(0, size, _COUNT_CHUNK):
        chunk = torch.from_numpy(counts[start : start + _COUNT_CHUNK].astype(np.int32))
        if is_distributed():
            chunk = chunk.to(device)
            torch.distributed.reduce(chunk, dst=MAIN)
            chunk = chunk.cpu()
        if is_main():
            for found, where, slot in ((missing, chunk == 0, 0), (twice, chunk > 1, 1)):
                hits = torch.nonzero(where).flatten()
                totals[slot] += len(hits)
                found.extend((hits[: _SHOWN - len(found)] + start).tolist())
    problem = ""
    if is_main():
        problem = _coverage_problem(
            size, (beyond[0], examples), (totals[0], missing), (totals[1], twice)
        )
    raise_everywhere(problem)


def _first_outside(outside: Found) -> list[int]:
    """The first few out-of-range indices of every rank, on rank 0."""
    mine = list(outside[1][:_SHOWN]) + [-1] * (_SHOWN - len(outside[1][:_SHOWN]))
    if not is_distributed():
        return [i for i in mine if i >= 0]
    tensor = torch.tensor(mine, dtype=torch.int64).to(collective_device())
    parts = [torch.empty_like(tensor) for _ in range(world_size())]
    torch.distributed.all_gather(parts, tensor)
    return [int(i) for part in parts for i in part.cpu().tolist() if i >= 0][:_SHOWN]


def gather_indexed(
    indices: torch.Tensor,
    size: int,
    *values: torch.Tensor,
    padding: torch.Tensor | None = None,
) -> list[torch.Tensor] | None:
    """Gather every rank's rows into whole tensors on rank 0, in dataset index order.

    ``indices`` (n,) gives the sample index of each of this rank's rows; each of ``values`` has
    n rows (outputs, labels, ...). ``padding`` (n,) marks rows that only repeat a sample to even
    out the shards (see :func:`padding_rows`); they are dropped. Rank 0 checks that every index
    in ``range(size)`` arrived exactly once and returns the ``(size, ...)`` tensors on the CPU;
    the other ranks return None. A gap or a duplicate raises :class:`CoverageError` on every
    rank (rank 0 names the indices). Only tensor collectives are used (``gather``), on the
    device the backend needs.
    """
    uneven = any(len(v) != len(indices) for v in values) or (
        padding is not None and len(padding) != len(indices)
    )
    if uneven and not is_distributed():
        raise ValueError(
            f"every tensor must have one row per index ({len(indices)}), but got "
            f"{[len(v) for v in values]}"
        )
    marked = indices.to(torch.int64).cpu().clone()
    if padding is not None and not uneven:
        marked[padding.cpu()] = -1
    if not is_distributed():
        return assemble([marked], [[v] for v in values], size)
    device = collective_device(values[0].device if values else None)
    lengths = _agreed_lengths(len(marked), size, uneven, device)
    longest = max(lengths)
    received = _gather(_pad(marked, longest, -1).to(device))
    received_values = [_gather_value(value, longest, device) for value in values]
    problem = ""
    assembled: list[torch.Tensor] | None = None
    if received is not None:
        try:
            parts_by_value = [parts for parts in received_values if parts is not None]
            assembled = assemble(
                [r[:n] for r, n in zip(received, lengths, strict=True)],
                [[p[:n] for p, n in zip(parts, lengths, strict=True)] for parts in parts_by_value],
                size,
            )
        except CoverageError as exc:
            problem = str(exc)
    raise_everywhere(problem)
    return assembled


def _agreed_lengths(rows: int, size: int, uneven: bool, device: torch.device) -> list[int]:
    """Every rank's row count, after every rank has said how many rows it sends, its dataset
    size and whether its rows fit its indices, before any of them sends rows: a problem on one
    rank stops all of them here."""
    shapes = torch.tensor([rows, size, int(uneven)], dtype=torch.int64, device=device)
    every = [torch.empty_like(shapes) for _ in range(world_size())]
    torch.distributed.all_gather(every, shapes)
    unfit = [r for r, s in enumerate(every) if int(s[2])]
    if unfit:
        raise ValueError(
            f"rank(s) {unfit} passed tensors whose rows do not match their indices; every "
            "tensor must have one row per index"
        )
    sizes = {int(s[1]) for s in every}
    if len(sizes) != 1:
        raise CoverageError(
            f"the ranks evaluate datasets of different sizes ({sorted(sizes)}); every rank "
            "must pass the same dataset"
        )
    return [int(s[0]) for s in every]


def _gather_value(
    value: torch.Tensor, longest: int, device: torch.device
) -> list[torch.Tensor] | None:
    """One tensor of rows gathered to rank 0 (booleans travel as uint8)."""
    transport = value.to(torch.uint8) if value.dtype == torch.bool else value
    parts = _gather(_pad(transport, longest, 0).to(device))
    if parts is not None and value.dtype == torch.bool:
        parts = [p.to(torch.bool) for p in parts]
    return parts


def _pad(tensor: torch.Tensor, length: int, fill: int) -> torch.Tensor:
    if len(tensor) == length:
        return tensor.contiguous()
    shape = (length - len(tensor), *tensor.shape[1:])
    extra = torch.full(shape, fill, dtype=tensor.dtype, device=tensor.device)
    return torch.cat([tensor, extra])


def _gather(tensor: torch.Tensor) -> list[torch.Tensor] | None:
    """``dist.gather`` to rank 0: the list of every rank's tensor there, None elsewhere."""
    parts = [torch.empty_like(tensor) for _ in range(world_size())] if is_main() else None
    torch.distributed.gather(tensor, parts, dst=MAIN)
    return parts


def raise_everywhere(problem: str) -> None:
    """Rank 0's coverage verdict (``problem``, empty when there is none) told to every rank,
    each of which raises :class:`CoverageError` on a problem (issue this on every rank)."""
    (failed,) = broadcast_ints([int(bool(problem))] if is_main() else None, 1)
    if failed:
        raise CoverageError(
            problem
            or "rank 0 found that the evaluation pass did not cover the dataset exactly "
            "once; the indices are named in rank 0's error"
        )

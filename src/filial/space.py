"""How many bytes a generation's target store takes, and whether the run directory has them.

A store holds, per training sample and view, the teacher's C outputs (or, with ``top_k``, its k
largest and their classes): ``N x views x (C or k) x dtype`` bytes, plus ``N x views x k x``
the index dtype for top-k. :func:`check_store_fits` compares that figure with the free space of
the file system the run directory is on (its nearest existing parent, since the directory may
not exist yet) before a teacher pass is spent on a store that cannot be written.

>>> store_bytes(samples=50_000, views=1, outputs=10)  # CIFAR-10, float16
1000000
>>> store_bytes(samples=1_000, views=1, outputs=1000, top_k=10)  # 10 x (2 + 2) bytes a sample
40000
"""

from __future__ import annotations

import os
import shutil
from pathlib import Path

import numpy as np

from .errors import InputError
from .store import STORE_DTYPES, index_dtype


class StoreTooLarge(InputError):
    """A target store of these sizes cannot fit on the run directory's file system."""


def store_bytes(
    samples: int, views: int, outputs: int, dtype: str = "float16", top_k: int | None = None
) -> int:
    """Bytes of one generation's ``targets.npy`` (and ``targets_index.npy`` with top-k),
    without the few hundred bytes of headers and manifest."""
    if dtype not in STORE_DTYPES:
        raise ValueError(f"dtype should be one of {STORE_DTYPES}, but got dtype={dtype!r}")
    for name, value in (("samples", samples), ("views", views), ("outputs", outputs)):
        if isinstance(value, bool) or not isinstance(value, (int, np.integer)) or value < 0:
            raise ValueError(f"{name} should be an integer >= 0, but got {name}={value!r}")
    rows = int(samples) * int(views)
    if top_k:
        kept = min(int(top_k), int(outputs))
        per_value = np.dtype(dtype).itemsize + np.dtype(index_dtype(int(outputs))).itemsize
        return rows * kept * per_value
    return rows * int(outputs) * np.dtype(dtype).itemsize


def nearest_existing(path: str | os.PathLike[str]) -> Path:
    """``path`` or its nearest parent that exists (a run directory is made later).

    ``os.path.exists`` is False for a name too long or a path through a file, where
    ``Path.exists`` raises, so such a path still finds the folder above it."""
    current = Path(path).absolute()
    while not os.path.exists(current) and current != current.parent:
        current = current.parent
    return current


def free_bytes(path: str | os.PathLike[str]) -> int:
    """Free bytes, for an unprivileged writer, on the file system ``path`` will be on."""
    return shutil.disk_usage(nearest_existing(path)).free


def readable(count: float) -> str:
    """``1536`` -> ``'1.5 KiB'``.

    >>> readable(512), readable(3 * 2**30), readable(4e16)
    ('512 bytes', '3.0 GiB', '35.5 PiB')
    """
    for unit in ("bytes", "KiB", "MiB", "GiB", "TiB", "PiB"):
        if count < 1024 or unit == "PiB":
            return f"{count:.0f} {unit}" if unit == "bytes" else f"{count:.1f} {unit}"
        count /= 1024
    raise AssertionError("unreachable")


def check_store_fits(
    run_dir: str | os.PathLike[str],
    samples: int,
    views: int,
    outputs: int,
    dtype: str = "float16",
    top_k: int | None = None,
    stores: int = 1,
) -> int:
    """Refuse (:class:`StoreTooLarge`) when ``stores`` target stores of these sizes exceed the
    free space where ``run_dir`` is; return the bytes one store takes.

    The message gives both figures and what lowers the first one. ``stores`` is how many must
    fit at once (the caller's choice: every generation keeps its store, so a whole lineage needs
    ``max_generations + 1``; the next one alone needs 1).
    """
    one = store_bytes(samples, views, outputs, dtype, top_k)
    needed = one * stores
    free = free_bytes(run_dir)
    if needed > free:
        layout = f"{samples:,} samples x views={views:,} x "
        layout += f"top_k={top_k} values and classes" if top_k else f"{outputs:,} outputs"
        total = f"; {stores:,} such stores take {readable(needed)}" if stores > 1 else ""
        fixes = ["lower views"] + ([] if top_k else ["set top_k (ce targets)"])
        fixes += ["store_dtype='float16'"] if dtype != "float16" else []
        raise StoreTooLarge(
            f"a target store of {layout} in {dtype} takes {readable(one)}{total}, but "
            f"{nearest_existing(run_dir)} has {readable(free)} free. To fit: "
            f"{', '.join(fixes)}, or teacher_mode='online' (no store)"
        )
    return one

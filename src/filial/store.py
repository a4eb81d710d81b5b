"""The on-disk cache of one teacher's outputs on the training set.

A store is a folder with two files, three in the top-k layout:

``targets.npy``
    the teacher's outputs, shape ``(N, views, C)``, float16 or float32, row ``i`` for dataset
    index ``i``; read memory-mapped, so a batch reads only its own rows. In the top-k layout,
    ``(N, views, k)``: the k largest outputs of each (sample, view), largest first.
``targets_index.npy``
    top-k layout only: the class of each kept output, int16 (int32 past 32,767 classes).
``targets.json``
    the manifest: layout, dtype, shape, byte size and sha256 of the array, the fingerprint of the
    training set it was computed on and the sha256 of the teacher checkpoint that produced it.

The manifest is written after the array, both atomically, so a store without a manifest is
incomplete and is never read. Nothing here knows about models or loops.

>>> import tempfile, numpy as np
>>> folder = tempfile.mkdtemp()
>>> outputs = np.arange(12, dtype=np.float32).reshape(3, 1, 4)
>>> store = TargetStore.write(folder, outputs, dtype="float32", fingerprint="f", teacher_sha256="t")
>>> store.gather(np.array([2, 0])).tolist()
[[8.0, 9.0, 10.0, 11.0], [0.0, 1.0, 2.0, 3.0]]
"""

from __future__ import annotations

import json
import os
from pathlib import Path
from typing import Any

import numpy as np

from ._io import atomic_write, atomic_write_json, sha256_file
from .errors import InputError

FORMAT = "filial.targets/1"
STORE_DTYPES = ("float16", "float32")
_FLOAT16_MAX = float(np.finfo(np.float16).max)


def index_dtype(classes: int) -> type[np.signedinteger]:
    """The class-index type of a top-k store: int16, or int32 past 32,767 classes.

    >>> index_dtype(1000).__name__, index_dtype(40_000).__name__
    ('int16', 'int32')
    """
    return np.int16 if classes <= np.iinfo(np.int16).max else np.int32


class StoreError(InputError):
    """A target store is missing, incomplete, damaged, or belongs to other data."""


def _storable(outputs: np.ndarray, dtype: str, top_k: int | None) -> np.ndarray:
    """``outputs`` if they can be stored as ``dtype`` (finite, in range, ``(N, views, C)``)."""
    if dtype not in STORE_DTYPES:
        raise StoreError(f"store dtype must be one of {STORE_DTYPES}, but got {dtype!r}")
    if outputs.ndim != 3 or 0 in outputs.shape:
        raise StoreError(
            f"outputs must have shape (N, views, C) with no empty axis, but got {outputs.shape}"
        )
    classes = outputs.shape[2]
    if top_k is not None and not 1 <= top_k <= classes:
        raise StoreError(f"top_k should lie in [1, {classes}], but got top_k={top_k!r}")
    if not np.isfinite(outputs).all():
        raise StoreError("outputs hold NaN or infinite values; such targets are never stored")
    if dtype == "float16":
        peak = float(np.abs(outputs).max())
        if peak > _FLOAT16_MAX:
            raise StoreError(
                f"the teacher's outputs reach {peak:.3g}, beyond float16's range "
                f"({_FLOAT16_MAX:.0f}); pass store_dtype='float32'"
            )
    return outputs


class TargetStore:
    """Read access to a finished store; :meth:`write` makes one."""

    ARRAY = "targets.npy"
    INDEX = "targets_index.npy"  # top-k layout only: the class of each kept value
    MANIFEST = "targets.json"

    def __init__(self, directory: str | os.PathLike[str]) -> None:
        self.directory = Path(directory)
        self._manifest: dict[str, Any] | None = None
        self._array: np.ndarray | None = None
        self._index: np.ndarray | None = None

    # -- writing -----------------------------------------------------------------------------

    @classmethod
    def write(
        cls,
        directory: str | os.PathLike[str],
        outputs: np.ndarray,
        *,
        dtype: str = "float16",
        fingerprint: str,
        teacher_sha256: str,
        top_k: int | None = None,
    ) -> TargetStore:
        """Write ``outputs`` of shape ``(N, views, C)`` as a complete store and return it.

        With ``top_k=k`` only the k largest outputs of each (sample, view) are kept, in
        ``targets.npy`` (N, views, k), with their class indices in ``targets_index.npy``
        (int16, or int32 when C needs it).
        """
        outputs = _storable(np.asarray(outputs), dtype, top_k)
        count, views, classes = outputs.shape
        directory = Path(directory)
        directory.mkdir(parents=True, exist_ok=True)
        manifest_path = directory / cls.MANIFEST
        # An older manifest must not vouch for the new arrays while they are being replaced.
        manifest_path.unlink(missing_ok=True)
        index = None
        if top_k is None:
            array = np.ascontiguousarray(outputs, dtype=dtype)
        else:
            # The k largest per row, largest first (ties broken by the lower class index).
            order = np.argsort(-outputs, axis=2, kind="stable")[:, :, :top_k]
            index = np.ascontiguousarray(order, dtype=index_dtype(classes))
            array = np.ascontiguousarray(np.take_along_axis(outputs, order, axis=2), dtype=dtype)
        array_path = directory / cls.ARRAY
        atomic_write(array_path, lambda handle: np.save(handle, array, allow_pickle=False))
        manifest = {
            "format": FORMAT,
            "layout": "dense" if index is None else "top_k",
            "dtype": dtype,
            "shape": list(array.shape),
            "count": count,
            "views": views,
            "classes": classes,
            "top_k": top_k,
            "bytes": array_path.stat().st_size,
            "bytes_per_sample": views * array.shape[2] * array.itemsize,
            "sha256": sha256_file(array_path),
            "fingerprint": fingerprint,
            "teacher_sha256": teacher_sha256,
        }
        if index is not None:
            index_path = directory / cls.INDEX
            atomic_write(index_path, lambda handle: np.save(handle, index, allow_pickle=False))
            manifest.update(
                index_dtype=str(index.dtype),
                index_bytes=index_path.stat().st_size,
                index_sha256=sha256_file(index_path),
                bytes_per_sample=views * top_k * (array.itemsize + index.itemsize),
            )
        atomic_write_json(manifest_path, manifest)
        store = cls(directory)
        store._manifest = manifest
        return store

    # -- reading -----------------------------------------------------------------------------

    def exists(self) -> bool:
        """True when a manifest is present (the array may still fail :meth:`verify`)."""
        return (self.directory / self.MANIFEST).is_file()

    @property
    def manifest(self) -> dict[str, Any]:
        if self._manifest is None:
            path = self.directory / self.MANIFEST
            if not path.is_file():
                raise StoreError(
                    f"no complete target store in {self.directory}: {self.MANIFEST} is missing"
                )
            try:
                manifest = json.loads(path.read_text(encoding="utf-8"))
            except (OSError, ValueError) as exc:
                raise StoreError(f"{path} is not a readable manifest ({exc})") from exc
            if not isinstance(manifest, dict) or manifest.get("format") != FORMAT:
                raise StoreError(f"{path} is not a filial target manifest ({FORMAT})")
            self._manifest = manifest
        return self._manifest

    @property
    def shape(self) -> tuple[int, int, int]:
        count, views, classes = self.manifest["shape"]
        return int(count), int(views), int(classes)

    def verify(self, *, fingerprint: str | None = None, checksum: bool = True) -> None:
        """Raise :class:`StoreError` unless the store is complete, intact and for these data."""
        manifest = self.manifest
        if fingerprint is not None and manifest.get("fingerprint") != fingerprint:
            raise StoreError(
                f"the targets in {self.directory} were computed on a different training set "
                f"(fingerprint {str(manifest.get('fingerprint'))[:12]}..., now "
                f"{fingerprint[:12]}...). Use the training data of this run, or start a new run "
                "directory."
            )
        path = self.directory / self.ARRAY
        if not path.is_file():
            raise StoreError(f"{path} is missing although its manifest exists")
        size = path.stat().st_size
        if size != manifest["bytes"]:
            raise StoreError(
                f"{path} has {size} bytes but its manifest records {manifest['bytes']}: the file "
                "was truncated or replaced"
            )
        if checksum and sha256_file(path) != manifest["sha256"]:
            raise StoreError(f"{path} does not match the sha256 in its manifest: it is damaged")
        if manifest.get("layout") == "top_k":
            index_path = self.directory / self.INDEX
            if not index_path.is_file() or index_path.stat().st_size != manifest["index_bytes"]:
                raise StoreError(f"{index_path} is missing or truncated")
            if checksum and sha256_file(index_path) != manifest["index_sha256"]:
                raise StoreError(f"{index_path} does not match its manifest: it is damaged")

    @property
    def array(self) -> np.ndarray:
        """The memory-mapped ``(N, views, C)`` array, opened on first use in each process."""
        if self._array is None:
            array = np.load(self.directory / self.ARRAY, mmap_mode="r", allow_pickle=False)
            if list(array.shape) != list(self.manifest["shape"]):
                raise StoreError(
                    f"{self.directory / self.ARRAY} has shape {array.shape}, but its manifest "
                    f"records {tuple(self.manifest['shape'])}"
                )
            # A plain ndarray over the mapping: indexing it skips np.memmap's per-call wrapping.
            self._array = np.asarray(array)
        return self._array

    @property
    def top_k(self) -> int | None:
        return self.manifest.get("top_k")

    @property
    def index_array(self) -> np.ndarray:
        """The top-k layout's memory-mapped class indices, (N, views, k)."""
        if self._index is None:
            index = np.load(self.directory / self.INDEX, mmap_mode="r", allow_pickle=False)
            self._index = np.asarray(index)
        return self._index

    def gather(self, indices: np.ndarray, views: np.ndarray | None = None) -> Any:
        """Rows for dataset ``indices`` (and one view each, default view 0).

        Dense layout: float32 (B, C). Top-k layout: ``(values, classes)``, float32 and int64
        arrays of shape (B, k).
        """
        rows = self._take(self.array, indices, views).astype(np.float32, copy=False)
        if self.top_k is None:
            return rows
        return rows, self._take(self.index_array, indices, views).astype(np.int64)

    @staticmethod
    def _take(array: np.ndarray, indices: np.ndarray, views: np.ndarray | None) -> np.ndarray:
        return array[:, 0].take(indices, axis=0) if views is None else array[indices, views]

    def read_all(self) -> np.ndarray:
        """The whole store as an in-memory float32 array of shape (N, views, C)."""
        return np.array(self.array, dtype=np.float32)  # a copy, never a view of the file

    def __getstate__(self) -> dict[str, Any]:
        # Worker processes (spawn on macOS) get the path, never an open memory map.
        state = self.__dict__.copy()
        state["_array"] = state["_index"] = None
        return state

    def __repr__(self) -> str:
        return f"TargetStore({str(self.directory)!r})"

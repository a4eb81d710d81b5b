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
incomplete and is never read. :meth:`TargetStore.write` writes outputs held in memory;
:class:`StoreWriter` writes a store batch by batch as a teacher pass produces it (rows at their
place, from one process or from several), with the same bytes. Nothing here knows about models
or loops.

>>> import tempfile, numpy as np
>>> folder = tempfile.mkdtemp()
>>> outputs = np.arange(12, dtype=np.float32).reshape(3, 1, 4)
>>> store = TargetStore.write(folder, outputs, dtype="float32", fingerprint="f", teacher_sha256="t")
>>> store.gather(np.array([2, 0])).tolist()
[[8.0, 9.0, 10.0, 11.0], [0.0, 1.0, 2.0, 3.0]]
"""

from __future__ import annotations

import errno
import hashlib
import json
import os
from pathlib import Path
from typing import Any

import numpy as np

from ._faults import fault_point
from ._io import atomic_write, atomic_write_json, fsync_dir, no_space, sha256_file, temp_name
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
        raise StoreError(_NOT_FINITE)
    if dtype == "float16":
        check_range(float(np.abs(outputs).max()), dtype)
    return outputs


_NOT_FINITE = "outputs hold NaN or infinite values; such targets are never stored"


def check_range(peak: float, dtype: str) -> None:
    """Raise :class:`StoreError` unless outputs whose largest magnitude is ``peak`` (NaN or
    infinite when some output is) can be stored as ``dtype``."""
    if not np.isfinite(peak):
        raise StoreError(_NOT_FINITE)
    if dtype == "float16" and peak > _FLOAT16_MAX:
        raise StoreError(
            f"the teacher's outputs reach {peak:.3g}, beyond float16's range "
            f"({_FLOAT16_MAX:.0f}); pass store_dtype='float32'"
        )


def _manifest(
    *,
    dtype: str,
    shape: tuple[int, int, int],
    classes: int,
    top_k: int | None,
    array: tuple[int, str],
    index: tuple[str, int, str] | None,
    fingerprint: str,
    teacher_sha256: str,
) -> dict[str, Any]:
    """The manifest of a store: ``array`` is (bytes, sha256) of ``targets.npy``, ``index``
    (dtype, bytes, sha256) of ``targets_index.npy`` in the top-k layout."""
    count, views, width = shape
    itemsize = np.dtype(dtype).itemsize
    manifest: dict[str, Any] = {
        "format": FORMAT,
        "layout": "dense" if index is None else "top_k",
        "dtype": dtype,
        "shape": [count, views, width],
        "count": count,
        "views": views,
        "classes": classes,
        "top_k": top_k,
        "bytes": array[0],
        "bytes_per_sample": views * width * itemsize,
        "sha256": array[1],
        "fingerprint": fingerprint,
        "teacher_sha256": teacher_sha256,
    }
    if index is not None:
        index_dtype_name, index_bytes, index_sha = index
        manifest.update(
            index_dtype=index_dtype_name,
            index_bytes=index_bytes,
            index_sha256=index_sha,
            bytes_per_sample=views * width * (itemsize + np.dtype(index_dtype_name).itemsize),
        )
    return manifest


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
        index_facts = None
        if index is not None:
            index_path = directory / cls.INDEX
            atomic_write(index_path, lambda handle: np.save(handle, index, allow_pickle=False))
            index_facts = (str(index.dtype), index_path.stat().st_size, sha256_file(index_path))
        manifest = _manifest(
            dtype=dtype,
            shape=(count, views, int(array.shape[2])),
            classes=classes,
            top_k=top_k,
            array=(array_path.stat().st_size, sha256_file(array_path)),
            index=index_facts,
            fingerprint=fingerprint,
            teacher_sha256=teacher_sha256,
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


class _Part:
    """One array file of a store being written: ``targets.npy``, or ``targets_index.npy``."""

    def __init__(
        self,
        path: Path,
        dtype: np.dtype[Any],
        shape: tuple[int, int, int],
        owner: int,
        create: bool,
    ) -> None:
        self.path = path
        self.temp = temp_name(path, owner)
        self.dtype = dtype
        self.shape = shape
        self.rows = shape[0] * shape[1]  # rows of the flat layout: code i * views + v
        self.row_bytes = shape[2] * dtype.itemsize
        self.fd: int | None = None
        if create:
            try:
                # numpy's own header, as np.save writes it; the rows are a hole until written.
                made = np.lib.format.open_memmap(self.temp, mode="w+", dtype=dtype, shape=shape)
                del made
            except OSError as exc:
                self.temp.unlink(missing_ok=True)
                raise no_space(path) if exc.errno == errno.ENOSPC else exc from None
        elif not self.temp.is_file():
            raise StoreError(
                f"{self.temp}, the temporary store rank 0 has made, is not there: every rank "
                "must see the same run directory (one machine, or a file system shared by the "
                "machines)"
            )
        self.fd = os.open(self.temp, os.O_RDWR)
        with open(self.temp, "rb") as handle:
            version = np.lib.format.read_magic(handle)
            read = (
                np.lib.format.read_array_header_1_0
                if version == (1, 0)
                else np.lib.format.read_array_header_2_0
            )
            found = read(handle)
            self.offset = handle.tell()
        if found != (shape, False, dtype):
            raise StoreError(f"{self.temp} holds {found}, not the expected {(shape, dtype)}")
        # The sha256 in file order, kept while the rows come in that order (one process):
        # then the finished file need not be read again.
        self.digest: Any = hashlib.sha256(os.pread(self.fd, self.offset, 0)) if create else None
        self.hashed_rows = 0

    def put(self, codes: np.ndarray, rows: np.ndarray) -> None:
        """Write ``rows`` (one per code) at the places of their ``codes``."""
        count = len(codes)
        if count == 0:
            return
        rows = np.ascontiguousarray(rows, dtype=self.dtype)
        if rows.shape != (count, self.shape[2]):
            raise ValueError(
                f"rows for {self.path.name} should have shape ({count}, {self.shape[2]}), but "
                f"got {rows.shape}"
            )
        low, high = int(codes.min()), int(codes.max())
        if low < 0 or high >= self.rows:
            raise ValueError(f"codes should lie in [0, {self.rows}), but got {low}..{high}")
        if high - low == count - 1 and int(codes[0]) == low and int(codes[-1]) == high:
            runs = [(0, count)]  # the usual case: a batch of consecutive codes, one write
        else:
            cuts = (np.flatnonzero(np.diff(codes) != 1) + 1).tolist()
            runs = list(zip([0, *cuts], [*cuts, count], strict=True))
        for start, stop in runs:
            self._write(int(codes[start]), rows[start:stop])

    def _write(self, row: int, rows: np.ndarray) -> None:
        assert self.fd is not None
        data = memoryview(rows.reshape(-1).view(np.uint8))  # type: ignore[arg-type]
        if self.digest is not None:
            if row == self.hashed_rows:
                self.digest.update(data)
                self.hashed_rows += len(rows)
            else:
                self.digest = None  # out of order: the finished file is hashed instead
        offset = self.offset + row * self.row_bytes
        try:
            while data:
                written = os.pwrite(self.fd, data, offset)
                data, offset = data[written:], offset + written
        except OSError as exc:
            raise no_space(self.path) if exc.errno == errno.ENOSPC else exc from None

    def sync(self) -> None:
        if self.fd is not None:
            os.fsync(self.fd)

    def sha256(self) -> str:
        if self.digest is not None and self.hashed_rows == self.rows:
            return str(self.digest.hexdigest())
        return sha256_file(self.temp)  # read back in blocks of 1 MiB: bounded memory

    def close(self) -> None:
        if self.fd is not None:
            os.close(self.fd)
            self.fd = None


class StoreWriter:
    """A store written batch by batch, each row at its place, as a teacher pass produces it.

    Note: a streamed store. :meth:`create` makes the store's array files as temporaries of
    their final size in the store's folder (``.targets.npy.tmp-PID``, named as
    :func:`filial._io.atomic_write` names its temporaries: numpy's header, then a hole for
    the rows). :meth:`put` writes rows at the byte offset of their codes ``i * views + v``
    with ``os.pwrite``, not through a memory map: pages written through a map count in the
    process's resident memory until they are written back (the whole store, at ImageNet
    size), and a file system shared by machines writes back whole pages, which would mix the
    rows of two ranks that share a page. :meth:`publish` fsyncs, renames and writes the
    manifest last, as :meth:`TargetStore.write` does, so a crash at any point leaves
    temporaries that the next run sweeps (their writer is dead) and never a store it trusts.
    The bytes are those of :meth:`TargetStore.write` for the same rows.

    Under a process group rank 0 creates the files, the other ranks :meth:`join` them by rank
    0's pid; every rank writes its own rows and :meth:`sync` s them, and rank 0 publishes.

    >>> import tempfile
    >>> folder = Path(tempfile.mkdtemp())
    >>> writer = StoreWriter.create(folder, count=3, views=1, classes=2, dtype="float32")
    >>> writer.put(np.array([2, 0, 1]), np.array([[4., 5.], [0., 1.], [2., 3.]]))
    >>> store = writer.publish(peak=5.0, fingerprint="f", teacher_sha256="t")
    >>> store.read_all()[:, 0].tolist()
    [[0.0, 1.0], [2.0, 3.0], [4.0, 5.0]]
    """

    def __init__(
        self,
        directory: str | os.PathLike[str],
        *,
        count: int,
        views: int,
        classes: int,
        dtype: str,
        top_k: int | None = None,
        owner: int | None = None,
    ) -> None:
        if dtype not in STORE_DTYPES:
            raise StoreError(f"store dtype must be one of {STORE_DTYPES}, but got {dtype!r}")
        if min(count, views, classes) < 1:
            raise StoreError(
                "a store needs count, views and classes of at least 1, but got "
                f"count={count}, views={views}, classes={classes}"
            )
        if top_k is not None and not 1 <= top_k <= classes:
            raise StoreError(f"top_k should lie in [1, {classes}], but got top_k={top_k!r}")
        self.directory = Path(directory)
        self.count, self.views, self.classes = int(count), int(views), int(classes)
        self.dtype, self.top_k = dtype, top_k
        self.owner = os.getpid() if owner is None else int(owner)
        self._creates = owner is None
        self._made_directory = False  # create() made the folder (discard() then removes it)
        width = self.classes if top_k is None else int(top_k)
        shape = (self.count, self.views, width)
        self.parts: list[_Part] = []
        try:
            self.parts.append(
                _Part(
                    self.directory / TargetStore.ARRAY,
                    np.dtype(dtype),
                    shape,
                    self.owner,
                    self._creates,
                )
            )
            if top_k is not None:
                self.parts.append(
                    _Part(
                        self.directory / TargetStore.INDEX,
                        np.dtype(index_dtype(self.classes)),
                        shape,
                        self.owner,
                        self._creates,
                    )
                )
        except BaseException:
            self.discard()
            raise

    @classmethod
    def create(cls, directory: str | os.PathLike[str], **layout: Any) -> StoreWriter:
        """Make the temporary files of a store (``count``, ``views``, ``classes``, ``dtype``,
        ``top_k``) in ``directory`` (made if needed), owned by this process."""
        made = not Path(directory).exists()
        Path(directory).mkdir(parents=True, exist_ok=True)
        writer = cls(directory, **layout)
        writer._made_directory = made
        return writer

    @classmethod
    def join(cls, directory: str | os.PathLike[str], owner: int, **layout: Any) -> StoreWriter:
        """Open the temporary files that process ``owner`` (rank 0) created, to write rows."""
        return cls(directory, owner=owner, **layout)

    @property
    def temporaries(self) -> list[Path]:
        return [part.temp for part in self.parts]

    def put(self, codes: np.ndarray, values: np.ndarray, classes: np.ndarray | None = None) -> None:
        """Write the rows of ``codes`` (``i * views + v``): the outputs, or in the top-k layout
        the k kept values (largest first) and their ``classes``."""
        codes = np.asarray(codes, dtype=np.int64)
        if (classes is None) != (self.top_k is None):
            raise ValueError("the top-k layout takes values and classes; the dense one values")
        self.parts[0].put(codes, values)
        if classes is not None:
            self.parts[1].put(codes, classes)

    def sync(self) -> None:
        """Make this process's rows durable (before another process publishes them)."""
        for part in self.parts:
            part.sync()

    def close(self) -> None:
        """Close the files without removing them (a rank that does not publish)."""
        for part in self.parts:
            part.close()

    def discard(self) -> None:
        """Close and remove the temporaries (when the store is not to be published)."""
        self.close()
        if self._creates:
            for part in self.parts:
                part.temp.unlink(missing_ok=True)
            # A folder this writer made and nothing else filled (a pass refused before anything
            # of its generation was written) goes too.
            folder = Path(self.directory)
            if self._made_directory and not any(folder.iterdir()):
                folder.rmdir()

    def publish(self, *, peak: float, fingerprint: str, teacher_sha256: str) -> TargetStore:
        """Check the outputs' range (``peak``: their largest magnitude, NaN or infinite if
        any output was), fsync and rename the files into place, then write the manifest.

        On any failure the temporaries are removed; the folder then holds no store (an older
        manifest is removed before the first rename)."""
        if not self._creates:
            raise RuntimeError("only the process that created a store's files publishes it")
        try:
            check_range(peak, self.dtype)
            manifest_path = self.directory / TargetStore.MANIFEST
            # An older manifest must not vouch for the new arrays while they are being replaced.
            manifest_path.unlink(missing_ok=True)
            facts = []
            for part in self.parts:
                fault_point("write", str(part.path))  # as atomic_write: payload in, not renamed
                part.sync()
                facts.append((part.temp.stat().st_size, part.sha256()))
                part.close()
                os.replace(part.temp, part.path)
            fsync_dir(self.directory)
            index = None
            if self.top_k is not None:
                index = (str(self.parts[1].dtype), *facts[1])
            manifest = _manifest(
                dtype=self.dtype,
                shape=self.parts[0].shape,
                classes=self.classes,
                top_k=self.top_k,
                array=facts[0],
                index=index,
                fingerprint=fingerprint,
                teacher_sha256=teacher_sha256,
            )
            atomic_write_json(manifest_path, manifest)
        except OSError as exc:
            self.discard()
            if exc.errno == errno.ENOSPC:
                raise no_space(self.directory / TargetStore.ARRAY) from exc
            raise
        except BaseException:
            self.discard()
            raise
        store = TargetStore(self.directory)
        store._manifest = manifest
        return store

    def __repr__(self) -> str:
        return f"StoreWriter({str(self.directory)!r}, owner={self.owner})"

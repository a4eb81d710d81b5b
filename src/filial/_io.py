"""Atomic file writes and the sweep of temporaries left by a killed process.

Every file that a later run trusts (checkpoints, target arrays, manifests, ``lineage.json``) is
written through :func:`atomic_write`: the bytes go to a temporary file in the same folder, are
flushed and fsynced, and only then renamed over the final name with ``os.replace``. A crash at any
point leaves either the old file or the new one, never a mixture; the temporary is removed on
failure, and :func:`sweep_temporaries` removes those of processes that are no longer alive.
"""

from __future__ import annotations

import errno
import hashlib
import json
import os
import re
import socket
import time
from collections.abc import Callable
from pathlib import Path
from typing import IO, Any

from ._faults import fault_point
from .errors import LockedError

_TEMP_RE = re.compile(r"^\..+\.tmp-(\d+)$")


def is_temporary(path: Path) -> bool:
    """True for the name of an atomic write's temporary file (``.NAME.tmp-PID``)."""
    return _TEMP_RE.match(path.name) is not None


def temp_name(path: Path, pid: int | None = None) -> Path:
    """The temporary that stands for ``path`` while process ``pid`` (default: this one) writes
    it: in the same folder, named after its writer, so that :func:`sweep_temporaries` knows
    when it is stale."""
    return path.with_name(f".{path.name}.tmp-{os.getpid() if pid is None else pid}")


def no_space(path: Path) -> OSError:
    """The error a full disk raises while ``path`` is written, saying what to do."""
    return OSError(
        errno.ENOSPC,
        f"no space left on the device while writing {path}; nothing was written there "
        "(the earlier file, if any, is intact). Free some space and rerun to resume",
    )


def fsync_dir(directory: Path) -> None:
    try:
        fd = os.open(directory, os.O_RDONLY)
    except OSError:  # some platforms (Windows) cannot open folders; the rename is still atomic
        return
    try:
        os.fsync(fd)
    except OSError:
        pass
    finally:
        os.close(fd)


def atomic_write(path: str | os.PathLike[str], write: Callable[[IO[bytes]], object]) -> Path:
    """Write a file through ``write(handle)`` so that it appears whole or not at all."""
    path = Path(path)
    tmp = temp_name(path)
    try:
        with open(tmp, "wb") as handle:
            write(handle)
            handle.flush()
            fault_point("write", str(path))
            os.fsync(handle.fileno())
        os.replace(tmp, path)
    except OSError as exc:
        tmp.unlink(missing_ok=True)
        if exc.errno == errno.ENOSPC:
            raise no_space(path) from exc
        raise
    except BaseException:
        tmp.unlink(missing_ok=True)
        raise
    fsync_dir(path.parent)
    return path


def atomic_write_json(path: str | os.PathLike[str], data: Any) -> Path:
    text = json.dumps(data, indent=2, sort_keys=False, allow_nan=True) + "\n"
    return atomic_write(path, lambda handle: handle.write(text.encode("utf-8")))


def sha256_file(path: str | os.PathLike[str], chunk: int = 1 << 20) -> str:
    digest = hashlib.sha256()
    with open(path, "rb") as handle:
        while block := handle.read(chunk):
            digest.update(block)
    return digest.hexdigest()


def _alive(pid: int) -> bool:
    if pid == os.getpid():
        return True
    try:
        os.kill(pid, 0)
    except ProcessLookupError:
        return False
    except PermissionError:  # exists, owned by someone else
        return True
    return True


def sweep_temporaries(root: str | os.PathLike[str]) -> list[Path]:
    """Remove temporaries under ``root`` whose writing process is dead; return what was removed."""
    removed: list[Path] = []
    root = Path(root)
    if not root.is_dir():
        return removed
    for path in root.rglob(".*.tmp-*"):
        match = _TEMP_RE.match(path.name)
        if match and path.is_file() and not _alive(int(match.group(1))):
            path.unlink(missing_ok=True)
            removed.append(path)
    return removed


class RunLock:
    """An exclusive lock on a run directory, held while this process works in it.

    The lock file records the holder's pid, host and start time. A second process is refused
    with the holder named. The operating system drops the lock when its holder dies (``flock``),
    so a lock file left by a killed process is taken over, with a message saying so. Within one
    process the lock is shared (a notebook may build a new Lineage over the same directory while
    the old object is still alive); it is released when its last holder releases it.
    """

    NAME = ".lock"
    _held: dict[str, list[int]] = {}  # resolved path -> [descriptor, holders] in this process

    def __init__(self, directory: str | os.PathLike[str]) -> None:
        self.path = Path(directory) / self.NAME
        self._key = str(self.path.resolve())
        self._holding = False
        self.previous: dict[str, object] | None = None

    def acquire(self) -> RunLock:
        if self._holding:
            return self
        shared = self._held.get(self._key)
        if shared is not None:
            shared[1] += 1
            self._holding = True
            return self
        fd = os.open(self.path, os.O_RDWR | os.O_CREAT, 0o644)
        holder = self._read(fd)
        try:
            import fcntl
        except ImportError:  # pragma: no cover - Windows has no flock: the pid check must do
            if holder and _alive(int(str(holder["pid"]))) and holder["pid"] != os.getpid():
                os.close(fd)
                raise LockedError(self.path.parent, holder) from None
        else:
            try:
                fcntl.flock(fd, fcntl.LOCK_EX | fcntl.LOCK_NB)
            except BlockingIOError:
                os.close(fd)
                raise LockedError(self.path.parent, holder) from None
        self.previous = holder if holder and holder.get("pid") != os.getpid() else None
        record = {"pid": os.getpid(), "host": socket.gethostname(), "started": time.time()}
        os.ftruncate(fd, 0)
        os.pwrite(fd, json.dumps(record).encode(), 0)
        self._held[self._key] = [fd, 1]
        self._holding = True
        return self

    @staticmethod
    def _read(fd: int) -> dict[str, object] | None:
        try:
            data = os.pread(fd, 4096, 0)
            holder = json.loads(data) if data else None
        except (OSError, ValueError):
            return None
        return holder if isinstance(holder, dict) and "pid" in holder else None

    def release(self) -> None:
        if not self._holding:
            return
        self._holding = False
        shared = self._held.get(self._key)
        if shared is None:
            return
        shared[1] -= 1
        if shared[1] == 0:
            del self._held[self._key]
            try:
                os.ftruncate(shared[0], 0)  # a clean exit leaves no holder to "take over"
            finally:
                os.close(shared[0])  # closing the descriptor drops the flock

    def __del__(self) -> None:
        try:
            self.release()
        except Exception:  # interpreter shutdown
            pass

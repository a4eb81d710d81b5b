"""Atomic file writes and the sweep of temporaries left by a killed process.

Every file that a later run trusts (checkpoints, target arrays, manifests, ``lineage.json``) is
written through :func:`atomic_write`: the bytes go to a temporary file in the same folder, are
flushed and fsynced, and only then renamed over the final name with ``os.replace``. A crash at any
point leaves either the old file or the new one, never a mixture; the temporary is removed on
failure, and :func:`sweep_temporaries` removes those of processes that are no longer alive.
"""

from __future__ import annotations

import hashlib
import json
import os
import re
from collections.abc import Callable
from pathlib import Path
from typing import IO, Any

_TEMP_RE = re.compile(r"^\..+\.tmp-(\d+)$")


def _temp_name(path: Path) -> Path:
    return path.with_name(f".{path.name}.tmp-{os.getpid()}")


def _fsync_dir(directory: Path) -> None:
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


def atomic_write(path: str | os.PathLike[str], write: Callable[[IO[bytes]], None]) -> Path:
    """Write a file through ``write(handle)`` so that it appears whole or not at all."""
    path = Path(path)
    tmp = _temp_name(path)
    try:
        with open(tmp, "wb") as handle:
            write(handle)
            handle.flush()
            os.fsync(handle.fileno())
        os.replace(tmp, path)
    except BaseException:
        tmp.unlink(missing_ok=True)
        raise
    _fsync_dir(path.parent)
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

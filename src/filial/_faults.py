"""Fault points for the crash-safety tests, armed only by the ``FILIAL_FAULT`` variable.

Only the test suite sets ``FILIAL_FAULT``; without it every call here returns at once. The value
is ``KIND:NAME[#N][=ACTION]``: at the ``N``-th (default first) time this process passes a fault
point of that kind whose name ends with ``NAME``, it kills itself with SIGKILL (a real,
uncatchable kill, as a power cut would be) or, with ``=enospc``, raises the error a full disk
raises. Kinds: ``batch`` (a training batch of ``fit_epochs``, name ``genG``), ``teacher`` (a batch
of the teacher pass, name ``genG``), ``write`` (an atomic write, after the payload reached the
temporary file and before it replaces the target; the name is the target's path), ``start`` (a
step of ``filial run`` before training: ``claimed``, ``recipe``, ``seedS``).
"""

from __future__ import annotations

import errno
import os
import signal

_SPEC = os.environ.get("FILIAL_FAULT") or None
_hits = 0


def _parse(spec: str) -> tuple[str, str, int, str]:
    action = "kill"
    if "=" in spec:
        spec, action = spec.rsplit("=", 1)
    count = 1
    if "#" in spec:
        spec, number = spec.rsplit("#", 1)
        count = int(number)
    kind, _, name = spec.partition(":")
    return kind, name, count, action


_TARGET = _parse(_SPEC) if _SPEC else None


def armed(kind: str) -> bool:
    """True when ``FILIAL_FAULT`` names a point of this kind (callers on a per-batch path ask
    once, so that an unarmed run pays nothing per batch)."""
    return _TARGET is not None and _TARGET[0] == kind


def fault_point(kind: str, name: str) -> None:
    """Die here (or fail like a full disk) if ``FILIAL_FAULT`` names this point."""
    global _hits
    if _TARGET is None:
        return
    want_kind, want_name, count, action = _TARGET
    if kind != want_kind or not name.endswith(want_name):
        return
    _hits += 1
    if _hits != count:
        return
    if action == "enospc":
        raise OSError(errno.ENOSPC, os.strerror(errno.ENOSPC))
    os.kill(os.getpid(), signal.SIGKILL)

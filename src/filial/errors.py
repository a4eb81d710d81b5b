"""Errors that mean "the input is wrong": the command exits with code 2 on them.

Each message names the problem and, where there is one obvious fix, the fix. Errors raised by a
bug or by the machine (a full disk) are not :class:`InputError`.
"""

from __future__ import annotations

import time
from collections.abc import Callable
from pathlib import Path
from typing import TypeVar

T = TypeVar("T")


class InputError(ValueError):
    """The user's data, model, settings or files cannot be used as given."""


class Problems:
    """Collect several input problems and raise them together (check everything, then refuse).

    >>> problems = Problems()
    >>> problems.attempt(lambda: int("x")) is None, len(problems)
    (True, 1)
    """

    def __init__(self) -> None:
        self.found: list[Exception] = []

    def __len__(self) -> int:
        return len(self.found)

    def add(self, problem: Exception) -> None:
        self.found.append(problem)

    def attempt(self, check: Callable[[], T]) -> T | None:
        """``check()``; a TypeError or ValueError it raises is collected (and None returned)."""
        try:
            return check()
        except (TypeError, ValueError) as exc:
            self.found.append(exc)
            return None

    def raise_if_any(self) -> None:
        """Raise the one problem, or a ValueError listing them all."""
        if len(self.found) == 1:
            raise self.found[0]
        if self.found:
            raise ValueError(
                "several settings are wrong:\n" + "\n".join(f"  - {p}" for p in self.found)
            )


class LockedError(InputError, RuntimeError):
    """Another live process works in this run directory (the command exits 2)."""

    def __init__(self, directory: Path, holder: dict[str, object] | None) -> None:
        who = "another process"
        if holder:
            since = time.localtime(float(str(holder["started"])))
            started = time.strftime("%Y-%m-%d %H:%M:%S", since)
            who = f"process {holder['pid']} on {holder.get('host', '?')} (since {started})"
        super().__init__(
            f"{directory} is in use by {who}; wait for it to finish or stop it, or use another "
            "run directory"
        )
        self.holder = holder

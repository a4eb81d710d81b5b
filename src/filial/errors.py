"""Errors that mean "the input is wrong": the command exits with code 2 on them.

Each message names the problem and, where there is one obvious fix, the fix. Errors raised by a
bug or by the machine (a full disk) are not :class:`InputError`.
"""

from __future__ import annotations


class InputError(ValueError):
    """The user's data, model, settings or files cannot be used as given."""

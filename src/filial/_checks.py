"""Argument checks of the shipped factories (``filial.demo``, ``filial.vision``).

Each check names the argument (as the recipe key where the factory is a recipe factory), the
accepted range and what came, PyTorch style, and raises :class:`~filial.errors.InputError`
before anything is allocated.

>>> integer(64, "data.batch_size", 1, 1000)
64
>>> integer(0, "data.batch_size", 1, 1000)  # doctest: +ELLIPSIS
Traceback (most recent call last):
...
filial.errors.InputError: data.batch_size should be an integer in 1..1,000, but got ...=0
"""

from __future__ import annotations

import math
import numbers
from collections.abc import Sequence
from typing import Any

from .errors import InputError

# The largest model a shipped factory builds: 2**30 (about 1.07e9) parameters are 4 GiB of
# float32 weights, and training holds the weights, their gradients and SGD's momentum (12 GiB)
# before any activation: past a laptop or a common single GPU, and far past what the 1,797
# digits or the 50,000 CIFAR images can use. A width typed with a few zeros too many (or
# 1000000000000) is refused here instead of failing inside torch's allocator.
MAX_PARAMETERS = 2**30
# torch.Generator.manual_seed takes seeds up to 2**64 - 1.
MAX_SEED = 2**64 - 1


def _span(low: float, high: float | None) -> str:
    return f">= {low:,}" if high is None else f"in {low:,}..{high:,}"


def integer(value: Any, name: str, low: int, high: int | None = None, why: str = "") -> int:
    """``value`` as an int in ``low..high`` (numpy integers welcome; bools and floats not)."""
    why = f" ({why})" if why else ""
    if isinstance(value, bool) or not isinstance(value, numbers.Integral):
        raise InputError(
            f"{name} should be an integer {_span(low, high)}{why}, but got {name}={value!r}"
        )
    number = int(value)
    if number < low or (high is not None and number > high):
        raise InputError(
            f"{name} should be an integer {_span(low, high)}{why}, but got {name}={number!r}"
        )
    return number


def fraction(value: Any, name: str) -> float:
    """A finite number in [0, 1)."""
    if (
        isinstance(value, bool)
        or not isinstance(value, numbers.Real)
        or not math.isfinite(value)
        or not 0.0 <= float(value) < 1.0
    ):
        raise InputError(f"{name} should be a number in [0, 1), but got {name}={value!r}")
    return float(value)


def flag(value: Any, name: str) -> bool:
    """True or False, nothing else (0, "yes" and [] are refused, not read as truth values)."""
    if not isinstance(value, bool):
        raise InputError(f"{name} should be true or false, but got {name}={value!r}")
    return value


def choice(value: Any, name: str, choices: Sequence[str]) -> str:
    if not isinstance(value, str) or value not in choices:
        options = " or ".join(repr(c) for c in choices)
        raise InputError(f"{name} should be {options}, but got {name}={value!r}")
    return value


def integers(
    value: Any,
    name: str,
    low: int,
    high: int | None = None,
    *,
    length: int | None = None,
    max_length: int | None = None,
    why: str = "",
) -> tuple[int, ...]:
    """A list (or tuple) of ints, each in ``low..high``; ``length`` exactly or ``max_length``
    at most. A bare int or a string is refused, not iterated."""
    count = f"{length} " if length is not None else ""
    shape = f"a list of {count}integers {_span(low, high)}"
    if not isinstance(value, (list, tuple)):
        raise InputError(
            f"{name} should be {shape} (e.g. [{max(low, 1) * 32}]), but got {name}={value!r}"
        )
    if length is not None and len(value) != length:
        raise InputError(f"{name} should be {shape}, but got {len(value)}: {name}={value!r}")
    if max_length is not None and len(value) > max_length:
        raise InputError(
            f"{name} should list at most {max_length:,} values ({why}), but got {len(value):,}"
        )
    return tuple(integer(v, f"{name}[{i}]", low, high) for i, v in enumerate(value))


def parameters(count: int, what: str) -> None:
    """Refuse a model of more than :data:`MAX_PARAMETERS` parameters, before it is built."""
    if count > MAX_PARAMETERS:
        raise InputError(
            f"{what} would have {count:,} parameters ({count * 4 / 2**30:,.1f} GiB of float32 "
            f"weights, about three times that to train); the shipped factories build at most "
            f"2**30 = {MAX_PARAMETERS:,}: use smaller widths"
        )

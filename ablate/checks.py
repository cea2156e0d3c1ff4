"""The small checks every layer repeats (one verb: ``check_*``): positive integers and numbers,
booleans, multiples, and errors in one line."""

from __future__ import annotations

import math


def check_positive_int(
    key: str, value, allow_none: bool = False, error: type[Exception] = ValueError
) -> None:
    """Raise ``error`` naming ``key`` unless ``value`` is an integer > 0 (or None when allowed)."""
    if allow_none and value is None:
        return
    if isinstance(value, bool) or not isinstance(value, int) or value <= 0:
        raise error(f"{key}={value!r}: must be a positive integer" + (" or null" if allow_none else ""))


def check_positive_number(key: str, value, error: type[Exception] = ValueError) -> None:
    """Raise ``error`` naming ``key`` unless ``value`` is a finite number > 0."""
    if (
        isinstance(value, bool)
        or not isinstance(value, (int, float))
        or not math.isfinite(value)
        or value <= 0
    ):
        raise error(f"{key}={value!r}: must be a positive, finite number")


def check_multiple(name: str, value: int, divisor: int, what: str) -> None:
    if not isinstance(value, int) or value <= 0 or value % divisor:
        raise ValueError(f"{name}={value} must be a positive multiple of {divisor} ({what})")


def check_bool(name: str, value) -> None:
    if not isinstance(value, bool):
        raise ValueError(f"{name}={value!r} must be true or false")


def one_line(exc: BaseException | str, limit: int = 160) -> str:
    """The first line of an error's message, cut to ``limit`` characters."""
    text = str(exc).strip()
    return (text.splitlines()[0] if text else type(exc).__name__)[:limit]

"""The small checks every layer repeats: positive integers and numbers, and errors in one line."""

from __future__ import annotations

import math


def positive_int(key: str, value, allow_none: bool = False, error: type[Exception] = ValueError) -> None:
    """Raise ``error`` naming ``key`` unless ``value`` is an integer > 0 (or None when allowed)."""
    if allow_none and value is None:
        return
    if isinstance(value, bool) or not isinstance(value, int) or value <= 0:
        raise error(f"{key}={value!r}: must be a positive integer" + (" or null" if allow_none else ""))


def positive_number(key: str, value, error: type[Exception] = ValueError) -> None:
    """Raise ``error`` naming ``key`` unless ``value`` is a finite number > 0."""
    if (
        isinstance(value, bool)
        or not isinstance(value, (int, float))
        or not math.isfinite(value)
        or value <= 0
    ):
        raise error(f"{key}={value!r}: must be a positive, finite number")


def one_line(exc: BaseException | str, limit: int = 160) -> str:
    """The first line of an error's message, cut to ``limit`` characters."""
    text = str(exc).strip()
    return (text.splitlines()[0] if text else type(exc).__name__)[:limit]

"""A grid cell: the design choices that set one group of runs apart from the others.

A :class:`Cell` is a small immutable mapping ``key -> value`` (keys sorted), printed as
``key=value`` pairs joined by commas (``attention=differential,attention.head_norm=true``) and read
back by :meth:`Cell.parse`. Commas inside brackets or quotes belong to the value
(``optim.betas=[0.9,0.98]``). The empty cell prints as ``default``.

Which override keys are design keys is decided here, once (:func:`is_design_key`): not the seed
(seeds are the blocks of a grid), not the recipe or where runs go, not the ``runtime.*``,
``grid.*`` or ``hydra.*`` settings. Within a grid only the swept keys are the cell; settings given
to the whole grid (``budget.tokens=2e6`` on the command line) belong to the grid, not to its cells
(:meth:`Cell.only`).
"""

from __future__ import annotations

from dataclasses import dataclass
from typing import Iterable, Mapping

__all__ = ["Cell", "is_design_key", "split_top_level", "level_text", "NOT_DESIGN", "NOT_DESIGN_PREFIXES"]

NOT_DESIGN = ("seed", "recipe", "run_root")
NOT_DESIGN_PREFIXES = ("hydra.", "runtime.", "grid.")
EMPTY = "default"


def is_design_key(key: str) -> bool:
    """Whether an override key names a design choice (a part of a cell)."""
    key = key.lstrip("+~")
    return key not in NOT_DESIGN and not key.startswith(NOT_DESIGN_PREFIXES)


def split_top_level(text: str, sep: str = ",") -> list[str]:
    """``text`` split at ``sep`` outside brackets, braces, parentheses and quotes."""
    parts, depth, quote, start = [], 0, None, 0
    for i, ch in enumerate(text):
        if quote:
            quote = None if ch == quote else quote
        elif ch in "'\"":
            quote = ch
        elif ch in "[{(":
            depth += 1
        elif ch in "]})":
            depth -= 1
        elif ch == sep and depth == 0:
            parts.append(text[start:i])
            start = i + 1
    parts.append(text[start:])
    return [p for p in parts if p]


def level_text(value) -> str:
    """A value as Hydra spells it in a job's overrides: booleans ``True``/``False`` however they
    were typed (``true``, ``False``), ``null`` for None, anything else as ``str`` gives it."""
    if value is None:
        return "null"
    text = str(value)
    return text.capitalize() if text.lower() in ("true", "false") else text


@dataclass(frozen=True, order=True)
class Cell:
    """Ordered ``key -> value`` design choices of a cell (values as the command line spells them)."""

    items: tuple[tuple[str, str], ...] = ()

    @classmethod
    def of(cls, pairs: Mapping[str, object] | Iterable[tuple[str, object]]) -> "Cell":
        pairs = pairs.items() if isinstance(pairs, Mapping) else pairs
        return cls(tuple(sorted((str(k), level_text(v)) for k, v in pairs)))

    @classmethod
    def parse(cls, text: str | "Cell") -> "Cell":
        """Read a printed cell (``key=value,...``; ``default`` is the empty cell)."""
        if isinstance(text, Cell):
            return text
        text = str(text).strip()
        if text in ("", EMPTY):
            return cls()
        pairs = []
        for part in split_top_level(text):
            if "=" not in part:
                raise ValueError(f"cell {text!r}: {part!r} is not key=value")
            key, value = part.split("=", 1)
            pairs.append((key.strip(), value.strip()))
        return cls.of(pairs)

    @classmethod
    def from_overrides(cls, overrides: Iterable[str], keys: Iterable[str] | None = None) -> "Cell":
        """The design part of a job's ``key=value`` overrides (deletions and the like left out);
        with ``keys``, only those keys (a grid's swept keys)."""
        wanted = None if keys is None else set(keys)
        pairs = []
        for o in overrides:
            if "=" not in o or o.startswith("~"):
                continue
            key, value = o.split("=", 1)
            key = key.lstrip("+")
            if is_design_key(key) and (wanted is None or key in wanted):
                pairs.append((key, value))
        return cls.of(pairs)

    def __str__(self) -> str:
        return ",".join(f"{k}={v}" for k, v in self.items) or EMPTY

    def __format__(self, spec: str) -> str:
        return format(str(self), spec)

    def __len__(self) -> int:
        return len(self.items)

    def as_dict(self) -> dict[str, str]:
        return dict(self.items)

    def keys(self) -> list[str]:
        return [k for k, _ in self.items]

    def get(self, key: str, default: str | None = None) -> str | None:
        return self.as_dict().get(key, default)

    def only(self, keys: Iterable[str]) -> "Cell":
        keep = set(keys)
        return Cell(tuple((k, v) for k, v in self.items if k in keep))

    def without(self, *keys: str) -> "Cell":
        return Cell(tuple((k, v) for k, v in self.items if k not in keys))

    def with_values(self, values: Mapping[str, object]) -> "Cell":
        return Cell.of({**self.as_dict(), **{k: level_text(v) for k, v in values.items()}})

    def contains(self, other: "Cell") -> bool:
        """Whether every ``key=value`` of ``other`` is also one of this cell's."""
        mine = self.as_dict()
        return all(mine.get(k) == v for k, v in other.items)

    def label(self, reference: "Cell") -> str:
        """What sets this cell apart from ``reference``: a differing value that names itself
        (``differential``), else ``key=value`` with the key's last part (``head_norm=True``,
        ``n_layers=4``), joined by commas; the whole cell when nothing differs."""
        ref = reference.as_dict()
        diff = [(k, v) for k, v in self.items if ref.get(k) != v]
        if len(diff) == 1 and _names_itself(diff[0][1]):
            return diff[0][1]
        return ",".join(f"{k.rsplit('.', 1)[-1]}={v}" for k, v in diff) or str(self)


def _names_itself(value: str) -> bool:
    """A value that reads as a name (``differential``), not a flag or a number (``True``, ``0.8``)."""
    if value in ("True", "False", "null"):
        return False
    try:
        float(value)
    except ValueError:
        return True
    return False

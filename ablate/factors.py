"""Factors of a grid and the contrasts that say which part of a design did what.

A grid that sweeps several design keys is a full factorial (Hydra's sweeper crosses them). Each
swept key is a :class:`Factor` with a reference level (declared in the recipe as
``grid.factors: {attention: standard, attention.head_norm: false}``; a swept key the recipe does
not declare gets its first swept value). A factor may exist only where another factor takes
some level (``within``: lambda's mode exists only for differential attention); it is analysed
within those cells (a nested factor).

Effects are contrasts: weighted sums of cell values, computed per seed (a seed is a block: the
same data order and shared initial weights in every cell), so each seed gives one value of each
effect. With reference levels r and a level l of factor A (Box, Hunter & Hunter, 2005, ch. 5,
effects as contrasts):

    main effect of A=l  = mean over the other factors' level combinations of y(A=l) - y(A=r)
    interaction of A=l, B=m = mean over the other factors of
                          [y(A=l, B=m) - y(A=r, B=m)] - [y(A=l, B=r) - y(A=r, B=r)]

that is, the interaction is the *difference* of the two simple effects of A (how much more A
changes the metric with B=m than with B=r). The two-level textbook convention divides it by 2;
this one does not. Higher-order interactions follow the same alternating sum (a k-factor
interaction here is 2^(k-1) times the textbook's two-level effect). Where a crossed factor's
level holds a nested factor, the crossed effects take the nested factor at its reference level.
"""

from __future__ import annotations

import itertools
from dataclasses import dataclass, field
from typing import Iterable, Mapping

from .cells import Cell, level_text

__all__ = [
    "Factor",
    "Contrast",
    "factors_of",
    "effect_contrasts",
    "pair_contrast",
    "contrast_values",
    "FactorError",
]


class FactorError(ValueError):
    """A factor declaration that does not fit the grid (names the key and what is allowed)."""


@dataclass(frozen=True)
class Factor:
    key: str
    reference: str
    levels: tuple[str, ...]  # the reference first
    within: Cell = field(default_factory=Cell)  # the factor exists only in cells containing these
    name: str = ""

    @property
    def label(self) -> str:
        """Short display name: the declared name, else the key's last part (``head_norm``)."""
        return self.name or self.key.rsplit(".", 1)[-1]

    @property
    def others(self) -> tuple[str, ...]:
        return tuple(v for v in self.levels if v != self.reference)

    def to_dict(self) -> dict:
        return {
            "key": self.key,
            "reference": self.reference,
            "levels": list(self.levels),
            "within": str(self.within) if len(self.within) else None,
            "name": self.name or None,
        }

    @classmethod
    def from_dict(cls, data: Mapping) -> "Factor":
        within = Cell.parse(data["within"]) if data.get("within") else Cell()
        return cls(data["key"], str(data["reference"]), tuple(data["levels"]), within, data.get("name") or "")


@dataclass(frozen=True)
class Contrast:
    """A weighted sum of cell values: an effect, a simple effect or a pairwise difference."""

    kind: str  # "main" | "interaction" | "simple" | "pair"
    terms: tuple[tuple[str, str], ...]  # (factor key, level) the contrast is about
    weights: tuple[tuple[Cell, float], ...]
    scope: Cell = field(default_factory=Cell)  # nested factors: the cells it is analysed within
    averaged_over: tuple[str, ...] = ()  # factor labels averaged over
    at: tuple[tuple[str, str], ...] = ()  # simple effects: the other factor held at this level

    @property
    def cells(self) -> list[Cell]:
        return [c for c, w in self.weights if w != 0]


def _declared(spec: Mapping | None) -> dict[str, dict]:
    out = {}
    for key, value in (spec or {}).items():
        entry = dict(value) if isinstance(value, Mapping) else {"reference": value}
        unknown = set(entry) - {"reference", "within", "levels", "name"}
        if unknown or "reference" not in entry:
            raise FactorError(
                f"grid.factors.{key}: give a reference level, or a mapping with 'reference' and "
                f"optionally 'within' (e.g. 'attention=differential') with its 'levels', and 'name'; "
                f"got {dict(entry)!r}"
            )
        out[str(key)] = entry
    return out


def factors_of(spec: Mapping | None, cells: Iterable[Cell]) -> list[Factor]:
    """The grid's factors: every swept key of ``cells``, with the declared reference level (or its
    first value), levels in order of appearance. Raises FactorError for a declared key that the
    grid does not sweep, or a reference level it does not run."""
    cells = list(cells)
    declared = _declared(spec)
    keys = list(dict.fromkeys(k for c in cells for k in c.keys()))
    missing = [k for k in declared if k not in keys]
    if missing:
        raise FactorError(
            f"grid.factors.{missing[0]}: not swept by this grid; swept keys: {', '.join(keys) or 'none'}"
        )
    order = list(declared) + [k for k in keys if k not in declared]
    factors = []
    for key in order:
        levels = list(dict.fromkeys(c.get(key) for c in cells if c.get(key) is not None))
        entry = declared.get(key, {})
        reference = level_text(entry["reference"]) if "reference" in entry else levels[0]
        if reference not in levels:
            raise FactorError(
                f"grid.factors.{key}: reference level {reference!r} is not run by this grid; "
                f"levels: {', '.join(levels)}"
            )
        within = Cell.parse(str(entry["within"])) if entry.get("within") else Cell()
        levels = [reference] + [v for v in levels if v != reference]
        factors.append(Factor(key, reference, tuple(levels), within, str(entry.get("name") or "")))
    return factors


def _scopes(factors: list[Factor]) -> list[tuple[Cell, list[Factor]]]:
    """(cells it applies to, factors crossed there): the crossed factors alone, then, per
    ``within``, its nested factors crossed with the crossed factors it does not fix."""
    crossed = [f for f in factors if not len(f.within)]
    scopes = [(Cell(), crossed)] if crossed else []
    for within in dict.fromkeys(f.within for f in factors if len(f.within)):
        nested = [f for f in factors if f.within == within]
        scopes.append((within, [f for f in crossed if f.key not in within.keys()] + nested))
    return scopes


def _alternating(scope: Cell, chosen: dict[str, str], refs: dict[str, str], rest: dict) -> dict[Cell, float]:
    """sum over subsets T of the chosen factors of (-1)^(|S|-|T|) y(T at chosen, S minus T at
    reference, the rest as given)."""
    keys = list(chosen)
    out: dict[Cell, float] = {}
    for flags in itertools.product((False, True), repeat=len(keys)):
        levels = {k: (chosen[k] if on else refs[k]) for k, on in zip(keys, flags)}
        sign = (-1) ** (len(keys) - sum(flags))
        cell = scope.with_values({**rest, **levels})
        out[cell] = out.get(cell, 0.0) + sign
    return out


def _averaged(scope: Cell, chosen: dict[str, str], factors: list[Factor]) -> dict[Cell, float]:
    refs = {f.key: f.reference for f in factors}
    others = [f for f in factors if f.key not in chosen]
    combos = list(itertools.product(*(f.levels for f in others)))
    weights: dict[Cell, float] = {}
    for combo in combos:
        rest = {f.key: v for f, v in zip(others, combo)}
        for cell, w in _alternating(scope, chosen, refs, rest).items():
            weights[cell] = weights.get(cell, 0.0) + w / len(combos)
    return weights


def _completed(cell: Cell, nested: list[Factor]) -> Cell:
    """The cell with every nested factor it lacks, where it exists (``within``), at reference."""
    extra = {f.key: f.reference for f in nested if cell.contains(f.within) and f.key not in cell.keys()}
    return cell.with_values(extra) if extra else cell


def _contrast(kind, scope, chosen, factors, nested, at=()) -> Contrast:
    weights = _averaged(scope, chosen, [f for f in factors if f.key not in dict(at)])
    if at:
        weights = {c.with_values(dict(at)): w for c, w in weights.items()}
    weights = {_completed(c, nested): w for c, w in weights.items()}
    others = tuple(f.label for f in factors if f.key not in chosen and f.key not in dict(at))
    return Contrast(
        kind,
        tuple(chosen.items()),
        tuple(sorted((c, w) for c, w in weights.items() if w != 0)),
        scope,
        others,
        tuple(at),
    )


def effect_contrasts(factors: list[Factor]) -> list[Contrast]:
    """Main effects of every non-reference level, then interactions of every order, per scope;
    for each two-factor interaction, the two simple effects of its first factor (at the second
    factor's reference level and at its level)."""
    out = []
    nested = [f for f in factors if len(f.within)]
    for scope, crossed in _scopes(factors):
        for order in range(1, len(crossed) + 1):
            for group in itertools.combinations(crossed, order):
                for levels in itertools.product(*(f.others for f in group)):
                    chosen = {f.key: v for f, v in zip(group, levels)}
                    kind = "main" if order == 1 else "interaction"
                    out.append(_contrast(kind, scope, chosen, crossed, nested))
                    if order == 2:
                        (a, b), (la, lb) = group, levels
                        for held in (b.reference, lb):
                            at = ((b.key, held),)
                            out.append(_contrast("simple", scope, {a.key: la}, crossed, nested, at))
    return out


def pair_contrast(cell: Cell, reference: Cell) -> Contrast:
    """The paired difference ``cell - reference``."""
    terms = tuple((k, v) for k, v in cell.items if reference.get(k) != v)
    return Contrast("pair", terms, ((cell, 1.0), (reference, -1.0)))


def contrast_values(values: Mapping[Cell, Mapping], contrast: Contrast) -> dict:
    """``seed -> value`` of the contrast, over the seeds every cell it needs has a value for."""
    needed = contrast.cells
    if any(c not in values for c in needed):
        return {}
    seeds = set.intersection(*(set(values[c]) for c in needed)) if needed else set()
    return {s: sum(w * values[c][s] for c, w in contrast.weights) for s in sorted(seeds, key=str)}

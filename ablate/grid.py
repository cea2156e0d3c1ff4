"""Before a grid trains: expand its jobs, check each config, and check fairness.

Uses Hydra's own override parser to expand the sweep as ``-m`` will, then composes each job's
config with the compose API.
"""

from __future__ import annotations

import itertools
import os
import re
from dataclasses import dataclass
from pathlib import Path

import torch
from hydra.core.hydra_config import HydraConfig
from hydra.core.override_parser.overrides_parser import OverridesParser
from hydra.utils import instantiate
from omegaconf import OmegaConf

from .attention import check_block
from .cells import Cell, level_text
from .compute import account, ratios
from .config import build_model, compose
from .data import family_of
from .probes import check_config
from .schema import ConfigError, check_ranges

__all__ = [
    "GridCell",
    "check_all",
    "check_cells",
    "check_data",
    "check_fairness",
    "check_probes_fit",
    "compose_checked",
    "expand_jobs",
    "find_baseline",
    "format_table",
    "output_folder",
    "price_budget",
    "swept_keys",
    "data_shape",
    "accounting_of",
    "hydra_message",
    "nested_branches",
    "sweep_jobs",
]


@dataclass
class GridCell:
    """One cell of a grid in the pre-flight: its design choices (``cell``: every design override
    of its first job until :func:`name_by_swept_keys` keeps only the swept ones), that job's
    overrides and config, and its accounting."""

    cell: Cell
    overrides: list
    cfg: object
    accounting: object = None

    @property
    def full(self) -> Cell:
        return Cell.from_overrides(self.overrides)


def sweep_jobs(parsed: list) -> list[list[str]]:
    """Every combination of the parsed overrides' values, in Hydra's basic-sweeper order: the cross
    product over keys in first-seen order, a later override of a key replacing an earlier one.
    Hydra has no public function for this expansion, so it is written here from the public
    ``Override`` API (``sweep_string_iterator``, ``get_value_element_as_str``)."""
    axes: dict[str, list[str]] = {}
    for o in parsed:
        key = o.get_key_element()
        if o.is_sweep_override():
            if not o.is_discrete_sweep():
                raise ConfigError(
                    f"{key}: only lists of values can be swept (a,b,c or choice(...)), not ranges"
                )
            axes[key] = [f"{key}={v}" for v in o.sweep_string_iterator()]
        else:
            axes[key] = [f"{key}={o.get_value_element_as_str()}"]
    return [list(job) for job in itertools.product(*axes.values())]


def expand_jobs(
    overrides: list[str], hydra_overrides: list[str] = ()
) -> tuple[list[list[str]], object, list[list[str]]]:
    """Every job's override list for ``h2h-train -m <overrides>``, recipe sweeps included;
    ``hydra_overrides`` (the command line's ``hydra.*`` ones, e.g. ``hydra.sweeper.params.seed=0``)
    take part in the compose as they do in Hydra's, but are not job overrides. Also returns the
    launch branches: one per group of nested factors (see :func:`nested_branches`), ``[[]]``
    when there are none."""

    parser = OverridesParser.create()
    try:
        parsed = parser.parse_overrides(overrides)
    except Exception as exc:
        raise ConfigError(hydra_message(exc)) from None
    first = [_first_value(o) for o in parsed]
    try:
        base = compose(first + list(hydra_overrides), return_hydra_config=True)
    except Exception as exc:
        raise ConfigError(hydra_message(exc)) from None
    params = dict(base.hydra.sweeper.params or {})
    cli_keys = {o.get_key_element() for o in parsed}
    merged = list(overrides) + [f"{k}={v}" for k, v in params.items() if k not in cli_keys]
    crossed = sweep_jobs(parser.parse_overrides(merged))
    branches = nested_branches(base.grid.get("factors"), crossed)
    if branches == [[]]:
        return crossed, base, branches
    jobs = [job for b in branches for job in sweep_jobs(parser.parse_overrides(merged + b))]
    return jobs, base, branches


def nested_branches(spec, crossed: list[list[str]]) -> list[list[str]]:
    """Launch branches for factors that exist only at one level of another
    (``grid.factors.<key>: {reference, levels, within: 'attention=differential'}``): Hydra's
    sweeper only crosses keys, so the grid launches once with the ``within`` key at its other
    levels and once at the ``within`` level with the nested keys swept. ``[[]]`` without nesting."""
    nested = {
        k: v
        for k, v in (OmegaConf.to_container(spec) if spec is not None else {}).items()
        if isinstance(v, dict) and v.get("within")
    }
    if not nested:
        return [[]]
    withins = {Cell.parse(str(v["within"])) for v in nested.values()}
    if len(withins) != 1 or len(next(iter(withins))) != 1:
        raise ConfigError(
            "grid.factors: nested factors must share one 'within' of one key=value "
            f"(e.g. within: attention=differential); got {', '.join(sorted(map(str, withins)))}"
        )
    ((key, level),) = next(iter(withins)).items
    for name, entry in nested.items():
        if not entry.get("levels"):
            raise ConfigError(
                f"grid.factors.{name}: a nested factor lists its 'levels' (e.g. [learned, fixed])"
            )
    swept = list(dict.fromkeys(Cell.from_overrides(j).get(key) for j in crossed))
    outside = [v for v in swept if v not in (None, level)]
    inside = [f"{key}={level}"] + [
        f"{name}={','.join(map(level_text, entry['levels']))}" for name, entry in nested.items()
    ]
    return ([[f"{key}={','.join(outside)}"]] if outside else []) + [inside]


def output_folder(overrides: list[str], multirun: bool) -> Path:
    """The folder Hydra will write into for these command-line overrides (``hydra.*`` ones
    included): ``hydra.sweep.dir`` for ``-m``, else ``hydra.run.dir``.

    Composed with Hydra's compose API (``return_hydra_config=True``) and resolved with the Hydra
    config set, as Hydra does before launching: a multirun composes without its sweep overrides
    (Hydra's defaults list skips them), and a relative folder is taken from the current folder
    (Hydra's run_job takes ``os.path.abspath`` of it).
    """

    try:
        parsed = OverridesParser.create().parse_overrides(overrides)
        keep = [o.input_line for o in parsed if not (multirun and o.is_sweep_override())]
        cfg = compose(keep, return_hydra_config=True)
        HydraConfig.instance().set_config(cfg)
        folder = OmegaConf.select(cfg, "hydra.sweep.dir" if multirun else "hydra.run.dir")
    except ConfigError:
        raise
    except Exception as exc:
        raise ConfigError(hydra_message(exc)) from None
    return Path(os.path.abspath(str(folder)))


def _first_value(o) -> str:
    if o.is_delete():
        return o.input_line
    value = str(next(iter(o.sweep_iterator()))) if o.is_sweep_override() else o.get_value_element_as_str()
    return f"{o.get_key_element()}={value}"


def data_shape(cfg) -> tuple[int, int]:
    """(vocabulary size, tokens per training sequence) of the config's data, without building it."""
    data = OmegaConf.to_container(cfg.data, resolve=True)
    return family_of(data).shape(data, int(cfg.model.seq_len))


def accounting_of(cfg):
    """Parameters and FLOPs per token of a config's model, on the meta device (no memory, no time)."""

    vocab_size, seq_len = data_shape(cfg)
    with torch.device("meta"):
        return account(build_model(cfg, vocab_size), seq_len)


def check_cells(jobs: list[list[str]]) -> list[GridCell]:
    """Compose and check every job; group jobs into cells (by their design overrides, the seed
    left out) and account each cell; each cell is then named by the keys the grid sweeps."""
    cells: dict[Cell, GridCell] = {}
    for job in jobs:
        cfg = compose_checked(job)
        cell = Cell.from_overrides(job)
        if cell not in cells:
            cells[cell] = GridCell(cell, job, cfg, accounting_of(cfg))
    found = list(cells.values())
    swept = swept_keys(found)
    for c in found:
        c.cell = c.cell.only(swept)
    return found


def swept_keys(cells: list[GridCell]) -> list[str]:
    """The design keys whose value differs between cells: the grid's design keys (the others
    are settings of the whole grid)."""
    fulls = [c.full.as_dict() for c in cells]
    keys = {k for d in fulls for k in d}
    return sorted(k for k in keys if len({d.get(k) for d in fulls}) > 1)


def baseline_overrides(run_overrides: list[str], baseline: str) -> list[str]:
    """A run's overrides with the baseline cell's ``key=value`` pairs in place of the same keys."""
    base = Cell.parse(baseline).as_dict()
    return [o for o in run_overrides if o.split("=", 1)[0] not in base] + [
        f"{k}={v}" for k, v in base.items()
    ]


def price_budget(cfg, overrides: list[str], baseline: str | None) -> float | None:
    """The training FLOPs ``budget.tokens`` buys when the budget is matched in FLOPs and no FLOPs
    figure is given: tokens x the FLOPs per token of the baseline cell at this job's other
    settings. None when the job needs no price. Composed here, in the pre-flight, so a run never
    composes a second config."""
    if cfg.budget.match != "flops" or cfg.budget.flops is not None:
        return None
    if not baseline:
        raise ConfigError(
            "budget.match=flops with budget.flops=null prices budget.tokens at the baseline's FLOPs "
            "per token, but grid.baseline is not set; set budget.flops or grid.baseline"
        )
    base_cfg = compose_checked(baseline_overrides(overrides, baseline))
    return float(cfg.budget.tokens) * accounting_of(base_cfg).flops_per_token


def compose_checked(overrides: list[str]):
    try:
        cfg = compose(overrides)
        OmegaConf.resolve(cfg)
    except ConfigError:
        raise
    except Exception as exc:
        raise ConfigError(hydra_message(exc)) from None
    check_all(cfg)
    return cfg


def check_all(cfg) -> None:
    """Schema ranges, the data group's own checks, and building one attention block."""

    check_ranges(cfg)
    check_data(cfg)
    if cfg.get("probes") is not None:
        check_probes_fit(cfg)

    try:
        with torch.device("meta"):
            block = instantiate(
                cfg.attention, d_model=cfg.model.d_model, layer_index=0, n_layers=cfg.model.n_layers
            )
    except Exception as exc:
        cause = exc.__cause__ or exc.__context__
        if isinstance(exc, ValueError) or isinstance(cause, ValueError):
            message = hydra_message(cause if isinstance(cause, ValueError) else exc)
            if "d_model" in message:
                head_dim = cfg.attention.get("head_dim")
                message += f" (model.d_model={cfg.model.d_model}, attention.head_dim={head_dim})"
            raise ConfigError(f"attention: {message}") from None
        raise ConfigError(
            f"attention._target_={cfg.attention.get('_target_')!r}: cannot build it: {hydra_message(exc)}"
        ) from None
    try:
        check_block(block)
    except TypeError as exc:
        raise ConfigError(f"attention._target_={cfg.attention.get('_target_')!r}: {exc}") from None


def check_data(cfg) -> None:
    """The data group's own checks, through its family (logbook: ``toy_corpus.check_config``;
    drills: ``DrillConfig.check`` and that a sequence fits ``model.seq_len``)."""
    data = OmegaConf.to_container(cfg.data, resolve=True)
    try:
        family_of(data).check(data, int(cfg.model.seq_len))
    except ConfigError:
        raise
    except ValueError as exc:
        message = hydra_message(exc)
        raise ConfigError(
            message if str(exc).startswith(("data", "seq_len")) else f"data.{message}"
        ) from None


def check_probes_fit(cfg) -> None:
    """The probes group's own checks, and that each enabled probe runs on the chosen data family."""
    try:
        probes = check_config(OmegaConf.to_container(cfg.probes, resolve=True))
    except ValueError as exc:
        raise ConfigError(hydra_message(exc)) from None
    family = family_of(OmegaConf.to_container(cfg.data, resolve=True))
    wrong = [name for name in probes["enabled"] if name not in family.probes]
    if wrong:
        where = f"drill data (data.kind={cfg.data.kind})" if family.name == "drill" else "the logbook corpus"
        raise ConfigError(
            f"probes.enabled: {wrong[0]!r} does not run on {where}; allowed: {', '.join(family.probes)} "
            f"(probes={'drill' if family.name == 'drill' else 'default'} has the right set)"
        )


def hydra_message(exc: BaseException) -> str:
    """Hydra's and OmegaConf's messages, squeezed to one readable line."""

    text = str(exc).strip()
    lines = [ln.strip() for ln in text.splitlines() if ln.strip()]
    missing = re.match(r"In '.*': Could not find '([^/']+)/([^']+)'", lines[0]) if lines else None
    if missing and any(ln.startswith("Available options") for ln in lines):
        start = next(i for i, ln in enumerate(lines) if ln.startswith("Available options")) + 1
        options = [ln for ln in lines[start:] if not ln.startswith(("Config search path", "provider="))]
        return f"{missing.group(1)}={missing.group(2)}: unknown choice; allowed: {', '.join(options)}"
    unknown = re.match(r"Could not override '([^']+)'", lines[0]) if lines else None
    if unknown:
        return (
            f"{unknown.group(1)}: unknown key; check the spelling, or add a new key with "
            f"+{unknown.group(1)}=<value>"
        )
    merging = re.match(r"Error merging override (.+)", lines[0]) if lines else None
    if merging and exc.__cause__ is not None:
        detail = str(exc.__cause__).splitlines()[0].strip()
        return f"{merging.group(1)}: {detail}"
    keep = [
        ln
        for ln in lines
        if not ln.startswith(("Config search path", "provider=", "object_type=", "Set the environment"))
    ]
    return " | ".join(keep[:3]) if keep else type(exc).__name__


def find_baseline(cells: list[GridCell], baseline: str | None) -> GridCell:
    """The cell whose design overrides include every ``key=value`` of ``baseline`` (the recipe
    names it without the overrides that all cells share, such as ``budget=smoke``)."""
    names = "; ".join(str(c.cell) for c in cells)
    if not baseline:
        raise ConfigError(
            "grid.baseline: not set; a grid needs the cell every comparison is made against, e.g. "
            f"grid.baseline='attention=standard' (quoted); cells: {names}"
        )
    try:
        wanted = Cell.parse(baseline)
    except ValueError as exc:
        raise ConfigError(f"grid.baseline={baseline!r}: {exc}; cells: {names}") from None
    matches = [c for c in cells if c.full.contains(wanted)]
    if len(matches) != 1:
        raise ConfigError(
            f"grid.baseline={baseline!r}: matches {len(matches)} cells of this grid, needs exactly one; "
            f"cells: {names}"
        )
    return matches[0]


def fairness_table(cells: list[GridCell], base: GridCell) -> list[dict]:
    return [
        {"cell": str(c.cell), **c.accounting.as_dict(), **ratios(c.accounting, base.accounting)}
        for c in cells
    ]


def differing_keys(a: GridCell, b: GridCell) -> set[str]:
    da, db = a.full.as_dict(), b.full.as_dict()
    return {k for k in set(da) | set(db) if da.get(k) != db.get(k)}


def matched_reference(
    cell: GridCell, base: GridCell, cells: list[GridCell], unequal_axes: list[str]
) -> GridCell | None:
    """The cell to check ``cell`` against: the baseline's choices, with the unequal-on-purpose
    axes set to this cell's values (so a size sweep compares each design at the same size)."""
    mine = cell.full.as_dict()
    want = base.full.without(*unequal_axes).with_values({a: mine[a] for a in unequal_axes if a in mine})
    return next((c for c in cells if c.full == want), None)


def check_fairness(
    cells: list[GridCell], base: GridCell, tolerance: float, unequal_axes: list[str]
) -> list[dict]:
    """Raise ConfigError with a table when a cell's parameter count differs by more than
    ``tolerance`` from the baseline's at the same values of the axes declared unequal on purpose
    (``unequal_axes``); every other axis is still checked."""
    rows = fairness_table(cells, base)
    bad = []
    for c, row in zip(cells, rows):
        reference = matched_reference(c, base, cells, unequal_axes)
        if reference is None:  # no like-for-like cell: only declared axes may differ from the baseline
            off = abs(row["params_ratio"] - 1)
            if off > tolerance and not differing_keys(c, base) <= set(unequal_axes):
                bad.append((row, base.cell, row["params_ratio"]))
            continue
        ratio = c.accounting.params / reference.accounting.params
        if abs(ratio - 1) > tolerance:
            bad.append((row, reference.cell, ratio))
    if bad:
        raise ConfigError(
            f"grid is not parameter-matched within grid.tolerance={tolerance}: "
            + "; ".join(
                f"{r['cell']} has {r['params']:,} params ({(ratio - 1) * 100:+.1f}% vs {ref})"
                for r, ref, ratio in bad
            )
            + ". Declare the axis in grid.unequal_axes if that is on purpose.\n"
            + format_table(rows)
        )
    return rows


def format_table(rows: list[dict]) -> str:
    width = max(len("cell"), *(len(r["cell"]) for r in rows))
    header = f"{'cell':<{width}} {'params':>10} {'vs base':>8} {'FLOPs/token':>12} {'vs base':>8}"
    lines = [header, "-" * len(header)]
    for r in rows:
        lines.append(
            f"{r['cell']:<{width}} {r['params']:>10,} {(r['params_ratio'] - 1) * 100:>+7.1f}% "
            f"{r['flops_per_token']:>12.3e} {(r['flops_ratio'] - 1) * 100:>+7.1f}%"
        )
    return "\n".join(lines)

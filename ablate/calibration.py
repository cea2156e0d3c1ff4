"""How often the bench's verdict rules are wrong, measured by simulation.

Each function simulates one rule many times on data whose truth is known and returns how often
its 95% interval covered the truth and how often it declared a direction that is not there.
``python -m ablate.calibration`` writes the shipped table (``calibration.json`` beside this file),
which the report's section "How far to trust these verdicts" quotes; ``tests/test_calibration.py``
runs the same simulations and recomputes that table.

Rules:

- ``fixed``: a fixed number of paired seeds, Student-t interval of the differences.
- ``two-stage``: Stein's (1945) two-stage seed rounds (``ablate.stats.two_stage_total`` and
  ``two_stage_interval``), the rule ``grid.max_seeds`` runs.
- ``doubling``: the earlier rule (double the seeds until the t half-width reaches the
  resolution), kept to show why it was replaced.
- ``formation``: a drill whose recall forms abruptly in some seeds only: the paired t interval on
  the area under the accuracy curve, and how often a comparison would be called resolved
  with and without the rule that needs at least half of the seeds formed in both designs.
"""

from __future__ import annotations

import json
import math
from pathlib import Path

import numpy as np
from scipy import stats

TABLE = Path(__file__).with_name("calibration.json")
LEVEL = 0.95
SEED = 20261205
REPS = 20000
FIXED_SEEDS = (3, 4, 6, 8, 16)
# (first stage, cap, resolution in SDs of the paired difference)
TWO_STAGE = [(n0, cap, w) for n0 in (3, 4) for cap in (8, 16, 32) for w in (0.3, 1.0, 3.0)]
FORMATION = [(4, 0.10, 0.25), (8, 0.10, 0.25), (4, 0.5, 0.5)]


def _t(df) -> np.ndarray:
    return stats.t.ppf(0.5 + LEVEL / 2, df)


def _summary(rule: str, params: dict, covered: np.ndarray, excludes_zero: np.ndarray, **extra) -> dict:
    reps = covered.size
    cover = float(covered.mean())
    return {
        "rule": rule,
        **params,
        "reps": int(reps),
        "coverage": round(cover, 4),
        "coverage_se": round(math.sqrt(cover * (1 - cover) / reps), 4),
        "false_direction": round(float(excludes_zero.mean()), 4),
        **{k: round(float(v), 4) for k, v in extra.items()},
    }


def fixed(n: int, reps: int, rng) -> dict:
    """t interval of n paired N(0, 1) differences (true mean 0)."""
    d = rng.normal(0.0, 1.0, (reps, n))
    half = _t(n - 1) * d.std(axis=1, ddof=1) / math.sqrt(n)
    mean = d.mean(axis=1)
    covered = np.abs(mean) <= half
    return _summary("fixed", {"seeds": n}, covered, ~covered)


def two_stage(n0: int, cap: int, resolution: float, reps: int, rng) -> dict:
    """Stein's two-stage rule on N(0, 1) differences; ``resolution`` in units of the true SD."""
    d = rng.normal(0.0, 1.0, (reps, cap))
    s0 = d[:, :n0].std(axis=1, ddof=1)
    needed = np.ceil((_t(n0 - 1) * s0 / resolution) ** 2)
    total = np.clip(needed, n0, cap).astype(int)
    sums = np.cumsum(d, axis=1)[np.arange(reps), total - 1]
    mean = sums / total
    half = _t(n0 - 1) * s0 / np.sqrt(total)
    covered = np.abs(mean) <= half
    return _summary(
        "two-stage",
        {"first_stage": n0, "cap": cap, "resolution_sd": resolution},
        covered,
        ~covered,
        mean_seeds=total.mean(),
        resolved=(half <= resolution).mean(),
    )


def doubling(n0: int, cap: int, resolution: float, reps: int, rng) -> dict:
    """The replaced rule: double the seeds until the t half-width is at most the resolution."""
    d = rng.normal(0.0, 1.0, (reps, cap))
    looks = [n0]
    while looks[-1] < cap:
        looks.append(min(cap, 2 * looks[-1]))
    stopped = np.zeros(reps, bool)
    covered = np.zeros(reps, bool)
    for n in looks:
        part = d[:, :n]
        half = _t(n - 1) * part.std(axis=1, ddof=1) / math.sqrt(n)
        stop = ~stopped & ((half <= resolution) | (n == looks[-1]))
        covered[stop] = (np.abs(part.mean(axis=1)) <= half)[stop]
        stopped |= stop
    return _summary(
        "doubling", {"first_stage": n0, "cap": cap, "resolution_sd": resolution}, covered, ~covered
    )


def drill_areas(n: int, p_a: float, p_b: float, reps: int, rng) -> tuple[np.ndarray, ...]:
    """Paired areas of two designs on a drill where recall forms abruptly in some seeds: about
    0.33 (SD 0.005) when not formed, uniform on [0.34, 0.98] when formed, formed with
    probability p_a and p_b independently per seed. Returns (formed_a, formed_b, area_a, area_b)."""
    fa, fb = rng.random((reps, n)) < p_a, rng.random((reps, n)) < p_b
    base = lambda: rng.normal(0.33, 0.005, (reps, n))  # noqa: E731
    area_a = np.where(fa, rng.uniform(0.34, 0.98, (reps, n)), base())
    area_b = np.where(fb, rng.uniform(0.34, 0.98, (reps, n)), base())
    return fa, fb, area_a, area_b


def formation(n: int, p_a: float, p_b: float, reps: int, rng, resolution: float = 0.02) -> dict:
    """The paired t interval on drill areas with partial formation: coverage of the true
    difference, how often it would be called resolved (half-width <= resolution), and how often
    it is resolved yet misses the truth, without and with the half-formed rule."""
    fa, fb, area_a, area_b = drill_areas(n, p_a, p_b, reps, rng)
    truth = (p_a - p_b) * (0.66 - 0.33)
    d = area_a - area_b
    half = _t(n - 1) * d.std(axis=1, ddof=1) / math.sqrt(n)
    covered = np.abs(d.mean(axis=1) - truth) <= half
    resolved = half <= resolution
    formed_enough = (fa.sum(axis=1) * 2 >= n) & (fb.sum(axis=1) * 2 >= n)
    false_direction = (np.abs(d.mean(axis=1)) > half) & (np.sign(d.mean(axis=1)) != np.sign(truth))
    return _summary(
        "formation",
        {"seeds": n, "formed_a": p_a, "formed_b": p_b, "resolution": resolution},
        covered,
        false_direction,
        resolved_old=resolved.mean(),
        false_resolved_old=(resolved & ~covered).mean(),
        resolved_new=(resolved & formed_enough).mean(),
        false_resolved_new=(resolved & formed_enough & ~covered).mean(),
    )


def table(reps: int = REPS, seed: int = SEED) -> list[dict]:
    """Every simulated rule, each from its own generator (seed, index), so entries reproduce alone."""
    jobs = [(fixed, (n,)) for n in FIXED_SEEDS]
    jobs += [(two_stage, p) for p in TWO_STAGE] + [(doubling, p) for p in TWO_STAGE]
    jobs += [(formation, p) for p in FORMATION]
    return [fn(*params, reps, np.random.default_rng([seed, i])) for i, (fn, params) in enumerate(jobs)]


def load() -> list[dict]:
    """The shipped table (empty when the file is missing)."""
    return json.loads(TABLE.read_text()) if TABLE.exists() else []


def main() -> None:
    rows = table()
    TABLE.write_text(json.dumps(rows, indent=1) + "\n")
    for row in rows:
        print(row)


if __name__ == "__main__":
    main()

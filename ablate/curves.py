"""Metrics of an accuracy-versus-tokens curve (pure numpy).

A curve is the logged points ``(tokens[i], acc[i])``, tokens strictly increasing, acc in [0, 1].

- ``tokens_to(tokens, acc, threshold)``: the first logged ``tokens[i]`` with ``acc[i] >= threshold``;
  ``None`` when no logged point reaches it (censored at the budget, never imputed).
- ``halfway(c) = (c + 1) / 2``: the accuracy halfway between the copy level ``c`` and 1.
- ``normalised_area(tokens, acc, budget_tokens, copy_level)``: with the point ``(0, c)`` in front
  (acc at token 0 is taken as the copy level, replacing a logged value there),

      area = (1 / B) * sum_i (t_{i+1} - t_i) * (a_i + a_{i+1}) / 2       over [0, B],

  the trapezoid rule, the curve cut at ``B = budget_tokens`` by linear interpolation; a number in
  [0, 1]. A curve that ends before the budget is refused (its tail would have to be imputed).
"""

from __future__ import annotations

import numpy as np


def check_curve(tokens, acc) -> tuple[np.ndarray, np.ndarray]:
    t, a = np.asarray(tokens, dtype=np.float64), np.asarray(acc, dtype=np.float64)
    if t.ndim != 1 or t.shape != a.shape or len(t) == 0:
        raise ValueError(f"curve: tokens {t.shape} and acc {a.shape} must be 1-D of one non-zero length")
    if np.any(np.diff(t) <= 0) or t[0] < 0:
        raise ValueError("curve: tokens must be >= 0 and strictly increasing")
    if not np.all(np.isfinite(a)) or a.min() < 0 or a.max() > 1:
        raise ValueError("curve: acc must be finite and in [0, 1]")
    return t, a


def tokens_to(tokens, acc, threshold: float) -> float | None:
    """First logged token count at which ``acc >= threshold``; ``None`` if never (censored)."""
    t, a = check_curve(tokens, acc)
    hits = np.flatnonzero(a >= threshold)
    return float(t[hits[0]]) if len(hits) else None


def halfway(copy_level: float) -> float:
    """(copy_level + 1) / 2."""
    if not 0.0 <= copy_level <= 1.0:
        raise ValueError(f"copy_level={copy_level}: must be in [0, 1]")
    return (copy_level + 1.0) / 2.0


def normalised_area(tokens, acc, budget_tokens: float, copy_level: float) -> float:
    """Trapezoid area under acc over [0, budget] divided by budget, acc(0) = copy level."""
    t, a = check_curve(tokens, acc)
    if not 0.0 <= copy_level <= 1.0:
        raise ValueError(f"copy_level={copy_level}: must be in [0, 1]")
    if not budget_tokens > 0:
        raise ValueError(f"budget_tokens={budget_tokens}: must be > 0")
    if t[-1] < budget_tokens:
        raise ValueError(
            f"curve: the last logged point ({t[-1]:g} tokens) is before the budget ({budget_tokens:g})"
        )
    if t[0] == 0:
        t, a = t[1:], a[1:]
    t, a = np.concatenate([[0.0], t]), np.concatenate([[copy_level], a])
    inside = t < budget_tokens
    end = np.interp(budget_tokens, t, a)
    t, a = np.append(t[inside], budget_tokens), np.append(a[inside], end)
    return float(np.sum(np.diff(t) * (a[1:] + a[:-1]) / 2.0) / budget_tokens)

"""Curve metrics on hand-made curves, against areas worked out by hand and scipy's trapezoid rule."""

from __future__ import annotations

import numpy as np
import pytest
import scipy.integrate

from ablate.curves import halfway, normalised_area, tokens_to


def test_halfway_is_midway_between_copy_level_and_one():
    assert halfway(0.34) == pytest.approx(0.67)
    assert halfway(0.0) == 0.5 and halfway(1.0) == 1.0
    with pytest.raises(ValueError, match="copy_level"):
        halfway(1.5)


def test_a_step_curve_crosses_at_its_step_and_has_the_area_worked_out_by_hand():
    tokens = [100, 200, 300, 400]
    acc = [0.2, 0.2, 1.0, 1.0]
    assert tokens_to(tokens, acc, halfway(0.2)) == 300.0
    # by hand, from (0, 0.2): [0,200] at 0.2 -> 40; [200,300] trapezoid (0.2+1)/2*100 -> 60; [300,400] -> 100
    assert normalised_area(tokens, acc, 400, 0.2) == pytest.approx(200 / 400)


def test_a_linear_ramp_has_the_closed_form_area():
    # acc(t) = c + (1 - c) t / B is linear, so the trapezoid rule is exact: area / B = (c + 1) / 2.
    c, budget = 0.125, 1000.0
    tokens = np.linspace(50, budget, 20)
    acc = c + (1 - c) * tokens / budget
    assert normalised_area(tokens, acc, budget, c) == pytest.approx((c + 1) / 2, abs=1e-12)
    # The same ramp cut at half the budget: (1/B') * integral_0^{B'} = c + (1 - c) / 4.
    assert normalised_area(tokens, acc, budget / 2, c) == pytest.approx(c + (1 - c) / 4, abs=1e-12)


def test_area_agrees_with_scipy_trapezoid_on_an_irregular_curve():
    rng = np.random.default_rng(0)
    tokens = np.cumsum(rng.integers(1, 50, size=30)).astype(float)
    acc = rng.random(30)
    expected = scipy.integrate.trapezoid(np.r_[0.3, acc], np.r_[0.0, tokens]) / tokens[-1]  # scipy docs
    assert normalised_area(tokens, acc, tokens[-1], 0.3) == pytest.approx(expected, rel=1e-12)


def test_a_logged_point_at_token_zero_is_replaced_by_the_copy_level():
    assert normalised_area([0, 10], [0.0, 0.5], 10, 0.5) == pytest.approx(0.5)


def test_a_curve_that_never_crosses_is_censored_not_imputed():
    tokens, acc = [100, 200, 300], [0.3, 0.4, 0.49]
    assert tokens_to(tokens, acc, 0.5) is None
    assert 0.0 <= normalised_area(tokens, acc, 300, 0.3) <= 1.0


def test_a_crossing_exactly_at_a_logged_point_counts_at_that_point():
    assert tokens_to([10, 20, 30], [0.2, 0.5, 0.9], 0.5) == 20.0


def test_a_curve_shorter_than_the_budget_is_refused():
    with pytest.raises(ValueError, match="before the budget"):
        normalised_area([10, 20], [0.1, 0.2], 30, 0.1)


@pytest.mark.parametrize(
    "tokens, acc", [([10, 10], [0.1, 0.2]), ([10, 20], [0.1, 1.2]), ([10], [0.1, 0.2]), ([], [])]
)
def test_bad_curves_are_refused(tokens, acc):
    with pytest.raises(ValueError, match="curve"):
        tokens_to(tokens, acc, 0.5)

"""The shipped calibration table is what the simulations give, and the simulations measure what
the rules claim: exact binomial and survival checks against scipy and a textbook example."""

import math

import numpy as np
import pytest
from scipy import stats

from ablate import calibration
from ablate.stats import censored_sign_test, kaplan_meier, km_median, paired_binary_test

MCSE = 3


def test_the_shipped_table_is_the_simulation_rerun():
    # Every entry comes from its own seeded generator, so the whole table reproduces exactly.
    assert calibration.load() == calibration.table()


def test_a_fixed_number_of_seeds_keeps_its_coverage_by_simulation():
    for n in calibration.FIXED_SEEDS:
        row = calibration.fixed(n, 6000, np.random.default_rng([3, n]))
        se = math.sqrt(0.95 * 0.05 / row["reps"])
        assert abs(row["coverage"] - 0.95) <= MCSE * se, row


def test_partial_formation_no_longer_resolves_falsely_by_simulation():
    # The simulation: area about 0.33 when recall did not form, 0.34-0.98 when it did,
    # formed in 10% of seeds for one design and 25% for the other (true difference -0.05).
    row = calibration.formation(4, 0.10, 0.25, 6000, np.random.default_rng(4))
    se = math.sqrt(0.05 * 0.95 / row["reps"])
    assert row["coverage"] < 0.85  # the t interval alone misleads here (0.78 in the issue)
    assert row["false_resolved_old"] > 0.15  # width-only "resolved" with coverage 0 (21% in the issue)
    assert row["false_resolved_new"] <= 0.05 + MCSE * se  # needing half of the seeds formed


def test_mcnemar_exact_is_a_binomial_test_on_the_discordant_seeds():
    # McNemar (1947), exact form: the discordant pairs against Binomial(b + c, 1/2) (scipy.stats.binomtest).
    a = [1, 1, 1, 1, 1, 0, 0, 1]
    b = [0, 0, 0, 0, 1, 0, 1, 1]
    only_a, only_b, p = paired_binary_test(a, b)
    assert (only_a, only_b) == (4, 1)
    assert p == pytest.approx(stats.binomtest(4, 5, 0.5).pvalue)
    assert p == pytest.approx(2 * (1 + 5) / 2**5)  # hand: two-sided, P(X <= 1) doubled
    assert paired_binary_test([1, 0], [1, 0]) == (0, 0, 1.0)


def test_censored_sign_test_counts_not_reached_as_later_than_any_reached_time():
    budget = 2e6
    a = [4e5, 5e5, None, 1.5e6, None]
    b = [9e5, None, 7e5, 1.5e6, None]
    # seed 0: a sooner; 1: a reached, b not: a sooner; 2: b sooner; 3: tie; 4: both censored: tie
    sooner_a, sooner_b, p = censored_sign_test(a, b, budget)
    assert (sooner_a, sooner_b) == (2, 1)
    assert p == pytest.approx(stats.binomtest(2, 3, 0.5).pvalue)


def test_kaplan_meier_on_the_textbook_remission_data():
    # Freireich et al. (1963) 6-MP arm, weeks in remission (+ = censored), the standard worked
    # example of Kaplan & Meier (1958) estimation, e.g. Kleinbaum & Klein, "Survival Analysis"
    # (ch. 2): S = 0.857, 0.807, 0.753, 0.690, 0.628, 0.538, 0.448 at 6, 7, 10, 13, 16, 22, 23;
    # median 23 weeks. Values recalled from memory; they follow from the product-limit formula.
    times = [6, 6, 6, 6, 7, 9, 10, 10, 11, 13, 16, 17, 19, 20, 22, 23, 25, 32, 32, 34, 35]
    event = [1, 1, 1, 0, 1, 0, 1, 0, 0, 1, 1, 0, 0, 0, 1, 1, 0, 0, 0, 0, 0]
    t, s, green = kaplan_meier(times, event)
    assert t.tolist() == [6, 7, 10, 13, 16, 22, 23]
    assert s == pytest.approx([0.857, 0.807, 0.753, 0.690, 0.628, 0.538, 0.448], abs=6e-4)
    # Greenwood's sum by hand: d / (n (n - d)) at each event time (n at risk 21, 17, 15, 12, 11, 7, 6).
    terms = [
        3 / (21 * 18),
        1 / (17 * 16),
        1 / (15 * 14),
        1 / (12 * 11),
        1 / (11 * 10),
        1 / (7 * 6),
        1 / (6 * 5),
    ]
    assert green == pytest.approx(np.cumsum(terms))
    median, low, high = km_median(times, event)
    assert median == 23 and low <= median and math.isnan(high)  # the upper end is not reached by the data

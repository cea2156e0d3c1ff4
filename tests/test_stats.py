import math

import numpy as np
import pytest
from scipy import stats as sps

from ablate.stats import mean_ci, paired_difference, seeds_needed


def test_t_quantiles_match_printed_table():
    # NIST/SEMATECH e-Handbook of Statistical Methods, section 1.3.6.7.2 (upper critical values
    # of the t distribution), column 0.025 upper tail: t(0.975, 2) = 4.303, t(0.975, 4) = 2.776.
    # mean_ci on the values -1, 0, 1 has s = 1, n = 3: half-width = t(0.975, 2) / sqrt(3).
    mean, low, high = mean_ci([-1.0, 0.0, 1.0])
    assert mean == 0.0
    assert high * math.sqrt(3) == pytest.approx(4.303, abs=5e-4)
    assert low == pytest.approx(-high)
    # Five values -2..2: s = sqrt(2.5), n = 5: half-width = t(0.975, 4) * sqrt(2.5) / sqrt(5).
    _, _, high5 = mean_ci([-2.0, -1.0, 0.0, 1.0, 2.0])
    assert high5 / (math.sqrt(2.5) / math.sqrt(5)) == pytest.approx(2.776, abs=5e-4)


@pytest.mark.parametrize("level", [0.9, 0.95, 0.99])
def test_mean_ci_equals_scipy_t_interval(level):
    # Reference: scipy.stats.t.interval with scale = standard error (scipy.stats.sem).
    values = np.array([3.21, 3.05, 3.30, 3.12])
    mean, low, high = mean_ci(values, level)
    ref_low, ref_high = sps.t.interval(level, len(values) - 1, loc=values.mean(), scale=sps.sem(values))
    assert mean == pytest.approx(values.mean(), rel=1e-12)
    assert low == pytest.approx(ref_low, rel=1e-12)
    assert high == pytest.approx(ref_high, rel=1e-12)


def test_mean_ci_one_value_has_no_interval():
    mean, low, high = mean_ci([2.5])
    assert mean == 2.5 and math.isnan(low) and math.isnan(high)


def test_mean_ci_rejects_empty_and_nan():
    with pytest.raises(ValueError):
        mean_ci([])
    with pytest.raises(ValueError):
        mean_ci([1.0, float("nan")])


def test_paired_difference_equals_scipy_ttest_rel():
    # Reference: scipy.stats.ttest_rel (paired t-test) and a t interval of the differences.
    a = np.array([2.91, 2.85, 2.97, 2.88])
    b = np.array([2.95, 2.90, 2.99, 2.94])
    mean, low, high, p = paired_difference(a, b)
    d = a - b
    ref_low, ref_high = sps.t.interval(0.95, len(d) - 1, loc=d.mean(), scale=sps.sem(d))
    assert mean == pytest.approx(d.mean(), rel=1e-12)
    assert (low, high) == (pytest.approx(ref_low, rel=1e-12), pytest.approx(ref_high, rel=1e-12))
    assert p == pytest.approx(sps.ttest_rel(a, b).pvalue, rel=1e-12)
    # The p-value is below 0.05 exactly when the 95% interval excludes 0 (duality of test and
    # interval; common practice, no source).
    assert (p < 0.05) == (high < 0 or low > 0)


def test_paired_difference_constant_offset_has_no_p_value():
    # Differences equal up to float rounding (0.3 stored three ways): no spread, so the t statistic
    # is undefined; p is NaN and the interval collapses onto the mean.
    a = np.array([0.701, 0.711, 0.721])
    b = np.array([0.401, 0.411, 0.421])
    mean, low, high, p = paired_difference(a, b)
    assert mean == pytest.approx(0.3) and low == pytest.approx(0.3) and high == pytest.approx(0.3)
    assert math.isnan(p)


def test_paired_difference_rejects_unequal_lengths():
    with pytest.raises(ValueError):
        paired_difference([1.0, 2.0], [1.0])


def test_aa_comparison_interval_covers_zero():
    # Same value-generating process under two names, 3 seeds: a per-seed effect shared by both
    # (same data order) plus independent noise. The paired interval must cover 0.
    rng = np.random.default_rng(7)
    seed_effect = rng.normal(0.0, 0.05, size=3)
    cell_a = 3.0 + seed_effect + rng.normal(0.0, 0.01, size=3)
    cell_b = 3.0 + seed_effect + rng.normal(0.0, 0.01, size=3)
    mean, low, high, p = paired_difference(cell_a, cell_b)
    assert low <= 0.0 <= high
    assert p > 0.05


def test_aa_comparison_coverage_is_near_nominal():
    # Over many A/A draws of 3 seeds the 95% interval covers 0 about 95% of the time.
    # 2000 draws: binomial sd of the rate is ~0.005, so [0.93, 0.97] is a 4-sd window.
    rng = np.random.default_rng(11)
    draws = 2000
    covered = 0
    for _ in range(draws):
        shared = rng.normal(0.0, 0.05, size=3)
        _, low, high, _ = paired_difference(shared + rng.normal(0, 0.01, 3), shared + rng.normal(0, 0.01, 3))
        covered += low <= 0.0 <= high
    assert 0.93 <= covered / draws <= 0.97


def test_seeds_needed_matches_closed_form():
    # Spread s = 0.02, target w = 0.01: normal approximation ceil((1.96 * 2)^2) = ceil(15.37) = 16.
    # t refinement by hand from the NIST/SEMATECH t-table (0.025 column): t(16) = 2.120 gives
    # 2.120 * 0.02 / sqrt(17) = 0.0103 > 0.01; t(17) = 2.110 gives 2.110 * 0.02 / sqrt(18) =
    # 0.00995 <= 0.01. So 18 seeds.
    assert seeds_needed(0.02, 0.01) == (16, 18)
    # Against the formula with scipy quantiles for a range of spreads.
    for s in [0.003, 0.011, 0.05, 0.3]:
        n_normal, n_t = seeds_needed(s, 0.01)
        assert n_normal == max(1, math.ceil((sps.norm.ppf(0.975) * s / 0.01) ** 2))
        assert sps.t.ppf(0.975, n_t - 1) * s / math.sqrt(n_t) <= 0.01
        assert sps.t.ppf(0.975, n_t - 2) * s / math.sqrt(n_t - 1) > 0.01 or n_t == 2
        assert n_t >= n_normal


def test_seeds_needed_zero_spread_and_bad_input():
    assert seeds_needed(0.0, 0.01) == (1, 2)
    with pytest.raises(ValueError):
        seeds_needed(0.01, 0.0)
    with pytest.raises(ValueError):
        seeds_needed(float("nan"), 0.01)


def test_holm_matches_hand_computation_and_statsmodels():
    from statsmodels.stats.multitest import multipletests

    from ablate.stats import holm

    # Hand computation (Holm, 1979): sorted p = 0.005, 0.01, 0.03, 0.04 with m = 4 ->
    # 4*0.005 = 0.02, 3*0.01 = 0.03, 2*0.03 = 0.06, max(1*0.04, 0.06) = 0.06; back in input order.
    p = [0.01, 0.04, 0.03, 0.005]
    assert holm(p).tolist() == pytest.approx([0.03, 0.06, 0.06, 0.02], rel=1e-12)
    # Reference implementation: statsmodels.stats.multitest.multipletests(method="holm").
    rng = np.random.default_rng(5)
    for _ in range(20):
        q = rng.uniform(0, 0.2, size=int(rng.integers(1, 12)))
        assert holm(q) == pytest.approx(multipletests(q, method="holm")[1], rel=1e-12)


def test_holm_leaves_untested_entries_out_of_the_count():
    from ablate.stats import holm

    out = holm([0.01, float("nan"), 0.02])
    assert math.isnan(out[1]) and out[0] == pytest.approx(0.02) and out[2] == pytest.approx(0.02)


def test_sd_interval_matches_printed_chi_square_table():
    from ablate.stats import sd_interval

    # NIST/SEMATECH e-Handbook 1.3.6.7.4 (critical values of the chi-square distribution), 4 degrees
    # of freedom: upper 0.025 point 11.143, lower 0.025 point 0.484. With s = 1, n = 5:
    # (sqrt(4 / 11.143), sqrt(4 / 0.484)) = (0.599, 2.875).
    low, high = sd_interval(1.0, 5)
    assert low == pytest.approx(math.sqrt(4 / 11.143), rel=1e-3)
    assert high == pytest.approx(math.sqrt(4 / 0.484), rel=2e-3)


def test_seeds_needed_range_brackets_the_point_estimate():
    from ablate.stats import seeds_needed_range

    low, high = seeds_needed_range(0.02, 4, 0.01)
    # Ends by hand: smallest n with t(0.975, n-1) * sd / sqrt(n) <= 0.01 for the chi-square SD bounds
    # (scipy.stats.chi2 / scipy.stats.t).
    ends = [0.02 * math.sqrt(3 / sps.chi2.ppf(q, 3)) for q in (0.975, 0.025)]
    hand = [
        next(n for n in range(2, 10**6) if sps.t.ppf(0.975, n - 1) * sd / math.sqrt(n) <= 0.01) for sd in ends
    ]
    assert [low, high] == hand and low <= seeds_needed(0.02, 0.01)[1] <= high

import math

import numpy as np
import pytest

from ablate.efficiency import (
    LOG_LINE,
    POWER_LAW,
    EfficiencyError,
    LossCurve,
    compare,
    fit_loss_curve,
    size_ratio,
)

SIZES = np.geomspace(1e5, 1e7, 6)


def _points(floor, amplitude, alpha, sizes, seeds, noise, rng):
    x = np.repeat(sizes, seeds)
    return x, floor + amplitude * x ** (-alpha) + rng.normal(0.0, noise, x.size)


def _cells(floor, amplitude, alpha, sizes, seeds, noise, rng):
    return {float(s): floor + amplitude * s ** (-alpha) + rng.normal(0.0, noise, seeds) for s in sizes}


def test_fit_recovers_known_power_law():
    # Known curve L = 2.0 + 100 x^-0.35 over 1e5..1e7 (loss 3.8 -> 2.4), 3 seeds, noise sd 0.002.
    # Tolerances (ours, about 3x the spread seen over repeated draws): E within 0.02 nats,
    # alpha within 0.01, A within 8%.
    rng = np.random.default_rng(3)
    curve = fit_loss_curve(*_points(2.0, 100.0, 0.35, SIZES, 3, 0.002, rng))
    assert curve.kind == POWER_LAW and curve.note == ""
    assert curve.floor == pytest.approx(2.0, abs=0.02)
    assert curve.exponent == pytest.approx(0.35, abs=0.01)
    assert curve.amplitude_at_unit_x() == pytest.approx(100.0, rel=0.08)


def test_pure_power_law_falls_back_to_log_line_and_says_so():
    # L = 50 x^-0.2 has no floor: the saturating fit pins E at 0, so the log-log line is used.
    rng = np.random.default_rng(4)
    x, y = _points(0.0, 50.0, 0.2, SIZES, 3, 0.001, rng)
    curve = fit_loss_curve(x, y)
    assert curve.kind == LOG_LINE
    assert "ill-conditioned" in curve.note
    assert curve.exponent == pytest.approx(0.2, abs=0.005)
    assert curve.amplitude_at_unit_x() == pytest.approx(50.0, rel=0.05)


def test_three_sizes_fall_back_to_log_line():
    rng = np.random.default_rng(5)
    curve = fit_loss_curve(*_points(2.0, 100.0, 0.35, SIZES[:3], 3, 0.002, rng))
    assert curve.kind == LOG_LINE and "3 distinct" in curve.note


def test_ratio_equals_closed_form_same_floor_and_exponent():
    # Same E and alpha: A_c x^-a = A_b x'^-a  =>  R = x / x' = (A_c / A_b)^(1/alpha), at every x
    # (algebra from the curve's definition).
    base = LossCurve(POWER_LAW, 2.0, 1.0, 0.35, 1e6)
    cand = LossCurve(POWER_LAW, 2.0, 0.8, 0.35, 1e6)
    expected = (0.8 / 1.0) ** (1 / 0.35)
    assert size_ratio(base, cand, np.geomspace(1e5, 1e7, 7)) == pytest.approx(np.full(7, expected), rel=1e-12)


def test_ratio_equals_closed_form_general_curves():
    # Different E, A, alpha (x_ref = 1): x' = (A_b / (L_c(x) - E_b))^(1/a_b), R = x / x'.
    base = LossCurve(POWER_LAW, 1.9, 60.0, 0.30, 1.0)
    cand = LossCurve(POWER_LAW, 2.0, 90.0, 0.38, 1.0)
    x = 3e6
    loss_c = 2.0 + 90.0 * x**-0.38
    expected = x / (60.0 / (loss_c - 1.9)) ** (1 / 0.30)
    assert float(size_ratio(base, cand, x)) == pytest.approx(expected, rel=1e-10)
    # A candidate below the baseline's floor: no finite x' exists, R is its limit 0.
    low = LossCurve(POWER_LAW, 1.0, 1.0, 0.3, 1e6)
    assert float(size_ratio(base, low, 1e8)) == 0.0


def test_ratio_from_fitted_exact_points_matches_closed_form():
    rng = np.random.default_rng(6)
    base = _cells(2.0, 100.0, 0.35, SIZES, 2, 0.0, rng)
    cand = _cells(2.0, 80.0, 0.35, SIZES, 2, 0.0, rng)
    result, base_fit, cand_fit = compare(
        "standard", base, "differential", cand, "params", resamples=50, seed=0
    )
    expected = (80.0 / 100.0) ** (1 / 0.35)
    assert result.ratio == pytest.approx(expected, rel=1e-4)
    # No noise: every resample is the same data, so the interval collapses onto the ratio.
    assert (result.ci_low, result.ci_high) == (
        pytest.approx(expected, rel=1e-4),
        pytest.approx(expected, rel=1e-4),
    )
    assert result.x_mid == pytest.approx(np.exp(np.log(SIZES).mean()))
    assert result.determined and result.approximate  # 2 seeds: labelled approximate
    assert "differential reaches standard's loss with 53% (approximate 95% CI" in result.sentence()


def test_compare_uses_one_curve_kind_for_both():
    # Baseline with a floor (power law fits), candidate without (falls back): both become lines.
    rng = np.random.default_rng(9)
    base = _cells(2.0, 100.0, 0.35, SIZES, 3, 0.002, rng)
    cand = _cells(0.0, 20.0, 0.15, SIZES, 3, 0.002, rng)
    _, base_fit, cand_fit = compare("standard", base, "differential", cand, "params", resamples=20)
    assert cand_fit.kind == LOG_LINE and base_fit.kind == LOG_LINE
    assert "to match differential" in base_fit.note


def test_compare_refuses_too_few_sizes_and_bad_axis():
    rng = np.random.default_rng(8)
    with pytest.raises(EfficiencyError, match="at least 3 distinct"):
        compare(
            "a",
            _cells(2, 100, 0.35, SIZES[:2], 3, 0.0, rng),
            "b",
            _cells(2, 80, 0.35, SIZES, 3, 0.0, rng),
            "params",
        )
    flat = {float(s): np.full(3, 3.0) for s in SIZES}
    with pytest.raises(EfficiencyError, match="axis"):
        compare("a", flat, "b", flat, "depth")


def test_rising_loss_is_not_determined():
    rng = np.random.default_rng(8)
    rising = {float(s): np.full(3, 1.0 + 1e-7 * s) for s in SIZES}
    result, _, _ = compare("a", rising, "b", _cells(2, 80, 0.35, SIZES, 3, 0.0, rng), "params", resamples=10)
    assert not result.determined and "does not fall" in result.reason
    assert result.sentence().startswith("b vs a: not determined by this sweep")


def test_flat_sweep_is_not_determined():
    # Loss the same at every size (exponent exactly 0 on noise-free data): no size ratio exists.
    flat = {float(s): np.full(3, 3.0) for s in SIZES}
    rng = np.random.default_rng(12)
    result, base_fit, _ = compare(
        "a", flat, "b", _cells(2.0, 80.0, 0.35, SIZES, 3, 0.0, rng), "params", resamples=20
    )
    assert abs(base_fit.exponent) < 1e-12
    assert not result.determined and "does not fall" in result.reason and math.isnan(result.ratio)
    noisy = {float(s): 3.0 + np.random.default_rng(int(s)).normal(0, 0.01, 5) for s in SIZES}
    result, _, _ = compare(
        "a", noisy, "b", _cells(2.0, 80.0, 0.35, SIZES, 5, 0.002, rng), "params", resamples=50
    )
    assert not result.determined


def test_exponent_of_exactly_zero_is_a_flat_curve_not_a_division_error():
    from ablate.efficiency import check_pair

    flat = LossCurve(LOG_LINE, 0.0, 3.0, 0.0, 1e6)
    falling = LossCurve(POWER_LAW, 2.0, 1.0, 0.35, 1e6)
    assert "does not fall" in check_pair(flat, falling, 1e6, (1e5, 1e7))
    assert "does not fall" in check_pair(falling, flat, 1e6, (1e5, 1e7))


def test_answer_outside_the_swept_range_is_not_determined():
    # Candidate 2 + 10 x^-0.35: the baseline 2 + 100 x^-0.35 needs (10)^(1/0.35) = 720x the size,
    # far beyond its swept 1e5..1e7 (closed form from the curve's definition).
    rng = np.random.default_rng(13)
    base = _cells(2.0, 100.0, 0.35, SIZES, 3, 0.002, rng)
    cand = _cells(2.0, 10.0, 0.35, SIZES, 3, 0.002, rng)
    result, _, _ = compare("a", base, "b", cand, "params", resamples=20)
    assert (
        not result.determined
        and "its swept range" in result.reason
        and ("above" in result.reason or "below" in result.reason)
    )


def _paired_cells(amplitude, seed_effect, rng, noise=0.01):
    """Cells of one design: shared per-seed offset (same data order in every cell) plus own noise."""
    return {
        float(s): {
            k: 2.0 + amplitude * s**-0.35 + e + rng.normal(0, noise) for k, e in enumerate(seed_effect)
        }
        for s in SIZES
    }


def test_well_posed_sweep_gives_the_closed_form_ratio():
    # Known E = 2, alpha = 0.35, A = 100 vs 80: R = 0.8^(1/0.35) = 0.529 (closed form).
    rng = np.random.default_rng(14)
    effect = rng.normal(0, 0.01, 6)
    result, _, _ = compare(
        "a",
        _paired_cells(100.0, effect, rng, 0.002),
        "b",
        _paired_cells(80.0, effect, rng, 0.002),
        "params",
        resamples=100,
    )
    assert result.determined and result.approximate  # 6 seeds: approximate below 10
    assert result.ratio == pytest.approx(0.8 ** (1 / 0.35), rel=0.05)
    assert result.ci_low <= 0.8 ** (1 / 0.35) <= result.ci_high


@pytest.mark.parametrize("seeds", [4, 10])
def test_joint_bootstrap_coverage_of_paired_seeds_is_near_nominal(seeds):
    # Seeded simulation of paired seeds: a per-seed offset shared by every cell (sd 0.01) plus
    # independent noise sd 0.01, baseline 2 + 100 x^-0.35, candidate 2 + 80 x^-0.35 (true
    # R = 0.529). 150 sweeps x 60 joint-seed resamples. The t-calibrated interval must cover at
    # least 0.95 minus three Monte-Carlo standard errors (sqrt(0.95 * 0.05 / 150) = 0.018).
    # Measured when written (200 sweeps): 0.930 at 4 seeds, 0.935 at 6, 0.945 at 10; the plain
    # percentile interval of the draws, failed draws dropped, gave 0.82 / 0.87 / 0.92.
    rng = np.random.default_rng(2024)
    truth = 0.8 ** (1 / 0.35)
    sims, covered = 150, 0
    for sim in range(sims):
        effect = rng.normal(0, 0.01, seeds)
        result, _, _ = compare(
            "a",
            _paired_cells(100.0, effect, rng),
            "b",
            _paired_cells(80.0, effect, rng),
            "params",
            resamples=60,
            seed=sim,
        )
        covered += result.ci_low <= truth <= result.ci_high
    print(f"joint bootstrap coverage at {seeds} seeds: {covered}/{sims}")
    assert covered / sims >= 0.95 - 3 * math.sqrt(0.95 * 0.05 / sims)
    assert result.approximate == (seeds < 10)


def test_failed_draws_count_as_extremes_not_dropped():
    from ablate.efficiency import _failed_side

    assert _failed_side("the baseline would need x = 3e8 for ..., above its swept range 1e5-1e7") == -math.inf
    assert _failed_side("the baseline would need x = 3e3 for ..., below its swept range 1e5-1e7") == math.inf
    assert _failed_side("the candidate's loss does not fall with x (fitted exponent -0.1)") == math.inf
    assert _failed_side("fit failed") == 0.0

"""A landmark across sizes on synthetic data: the growth laws, the per-seed slopes, the verdict."""

from __future__ import annotations

import math

import numpy as np
import pytest

from harness.results.judgement import Margin
from harness.studies import landmark_scaling as ls

SIZES = np.array([250.0, 500.0, 1000.0, 2000.0])


def test_log_law_recovers_a_and_b_with_the_textbook_errors():
    # Exact data a + b ln N; with equal errors sigma the weighted fit is ordinary least squares,
    # var(b) = sigma^2 / Sxx and var(a) = sigma^2 sum x^2 / (n Sxx), x = ln N (common practice, no source).
    a, b, sigma = 40.0, 22.0, 3.0
    fit = ls.fit_log_law(SIZES, a + b * np.log(SIZES), np.full(4, sigma))
    x = np.log(SIZES)
    sxx = np.sum((x - x.mean()) ** 2)
    assert fit.params["a"] == pytest.approx(a, rel=1e-10) and fit.params["b"] == pytest.approx(b, rel=1e-10)
    assert fit.errors["b"] == pytest.approx(sigma / math.sqrt(sxx), rel=1e-10)
    assert fit.errors["a"] == pytest.approx(sigma * math.sqrt(np.sum(x**2) / (4 * sxx)), rel=1e-10)
    assert fit.chi2 == pytest.approx(0.0, abs=1e-18) and fit.dof == 2


def test_log_law_on_noisy_data_is_unbiased_with_honest_errors():
    # 2000 replicate data sets: the fitted b scatters around the truth by its stated error.
    rng = np.random.default_rng(11)
    sigma = np.array([2.0, 3.0, 4.0, 6.0])  # unequal errors: the weights matter
    pulls, slopes = [], []
    for _ in range(2000):
        y = 40.0 + 22.0 * np.log(SIZES) + sigma * rng.standard_normal(4)
        fit = ls.fit_log_law(SIZES, y, sigma)
        slopes.append(fit.params["b"])
        pulls.append((fit.params["b"] - 22.0) / fit.errors["b"])
    assert abs(np.mean(pulls)) < 0.08  # 3 standard errors of a mean of 2000 unit pulls: 0.067
    assert np.std(pulls) == pytest.approx(1.0, abs=0.05)


def test_power_law_recovers_a_known_law():
    sizes = np.append(SIZES, 4000.0)
    fit = ls.fit_power_law(sizes, 3.0 * sizes**-0.8 + 1.0, np.full(5, 1e-4), 0.5)
    assert fit.params["b"] == pytest.approx(0.8, rel=1e-5) and fit.params["a"] == pytest.approx(3.0, rel=1e-4)
    assert fit.params["c"] == pytest.approx(1.0, rel=1e-6) and fit.dof == 2
    # held at its bound (b >= 1 asked of a law with b = 0.8): no errors for a and b
    bounded = ls.fit_power_law(sizes, 3.0 * sizes**-0.8 + 1.0, np.full(5, 1e-4), 1.0)
    assert bounded.params["b"] == pytest.approx(1.0) and math.isnan(bounded.errors["b"])


def test_per_seed_slopes_match_numpy_polyfit():
    rng = np.random.default_rng(5)
    values = rng.standard_normal((6, 4)) + 3.0 * np.log(SIZES)
    values[2, 1] = np.nan  # a seed without the landmark at one size has no slope
    slopes = ls.per_seed_slopes(SIZES, values)
    for s in (0, 1, 3, 4, 5):
        assert slopes[s] == pytest.approx(np.polyfit(np.log(SIZES), values[s], 1)[0], rel=1e-12)
    assert math.isnan(slopes[2])


def _seeds(growth_theory: float, seeds: int = 40) -> tuple[np.ndarray, np.ndarray]:
    """Per-seed escape times a + b ln N (b = 22) with seed-to-seed spread; the theory paired to them."""
    rng = np.random.default_rng(7)
    x = np.log(SIZES)
    seed_offset = 6.0 * rng.standard_normal((seeds, 1))  # a seed's own asymmetry, shared by its theory
    sim = 40.0 + 22.0 * x + seed_offset + 2.0 * rng.standard_normal((seeds, 4))
    theory = 40.0 + growth_theory * (x - x[0]) + 22.0 * x[0] + seed_offset + 2.0 * rng.standard_normal((seeds, 4))
    return sim, theory


def test_a_theory_that_grows_as_the_simulation_is_consistent():
    sim, theory = _seeds(22.0)
    present = np.ones_like(sim, bool)
    outcome, needed, items, presences, band = ls.judge_growth(SIZES, sim, theory, present, present, Margin())
    assert ls.OUTCOME_NAMES[outcome] == "consistent", items
    assert [item.verdict for item in items] == ["agree"] * 5 and presences == ["both"] * 4
    # growth margin: the slope that moves the landmark by 5 % of its mean at N_max across ln(2000 / 250)
    growth = items[-1]
    assert growth.name == ls.GROWTH
    assert growth.delta == pytest.approx(0.05 * abs(np.mean(sim[:, -1])) / math.log(8.0), rel=1e-12)
    assert band.cells == 5


def test_a_theory_growing_a_third_too_fast_is_inconsistent():
    sim, theory = _seeds(30.0)
    present = np.ones_like(sim, bool)
    outcome, _, items, _, _ = ls.judge_growth(SIZES, sim, theory, present, present, Margin())
    assert ls.OUTCOME_NAMES[outcome] == "inconsistent"
    assert items[-1].verdict == "disagree"  # the growth rate, 8 per e-fold off, is shown to differ
    assert items[0].verdict == "agree"  # at the smallest size the two still agree


def test_a_landmark_name_must_be_known():
    from harness.core.errors import InputError

    assert ls.landmark_name("landmark:plateau_exit") == "plateau_exit" and ls.landmark_name("test_error") is None
    with pytest.raises(InputError, match="--observable: a landmark must be one of"):
        ls.check_observable("landmark:escape")

"""Power-law fits against scipy.stats.linregress."""
import numpy as np
import pytest
from scipy import stats

from bigprune.learning.powerlaw import fit_power_law, smallest_sufficient


def test_fit_matches_linregress():
    rng = np.random.default_rng(1)
    n = np.repeat([50, 100, 200, 400, 800, 1600], 3)
    error = 2.0 * n ** -0.3 * np.exp(rng.normal(0, 0.05, n.size))
    fit = fit_power_law(n, error, bootstrap=300)
    # reference: scipy.stats.linregress on (log n, log error)
    ref = stats.linregress(np.log(n), np.log(error))
    assert fit["alpha"] == pytest.approx(-ref.slope, rel=1e-10)
    assert fit["a"] == pytest.approx(np.exp(ref.intercept), rel=1e-10)
    assert fit["r2"] == pytest.approx(ref.rvalue ** 2, rel=1e-10)
    assert fit["alpha_low"] < fit["alpha"] < fit["alpha_high"]
    assert 0.25 < fit["alpha"] < 0.35  # the exponent the data were drawn with (0.3)


def test_exact_power_law_recovered():
    n = np.array([10, 100, 1000, 10000])
    fit = fit_power_law(n, 0.5 * n ** -0.5, bootstrap=50)
    assert fit["alpha"] == pytest.approx(0.5) and fit["a"] == pytest.approx(0.5) and fit["r2"] == pytest.approx(1)


def test_zero_errors_are_dropped_and_single_size_is_nan():
    fit = fit_power_law([10, 20, 40], [0.2, 0.0, 0.1], bootstrap=10)
    assert fit["dropped"] == 1 and fit["points"] == 2
    assert np.isnan(fit_power_law([10, 10], [0.2, 0.3], bootstrap=10)["alpha"])


def test_smallest_sufficient_budget():
    budgets = [0.5, 0.01, 0.1]
    acc = [[0.90, 0.91], [0.70, 0.72], [0.895, 0.90]]
    assert smallest_sufficient(budgets, acc, full_accuracy=0.905, tolerance=0.01) == 0.1
    assert smallest_sufficient(budgets, acc, full_accuracy=0.99, tolerance=0.01) is None


def test_fit_from_few_budgets_is_unreliable():
    # The rule: fewer than 5 distinct budgets make an unreliable fit, whatever the data.
    n = np.repeat([100, 200, 400, 800], 3)
    fit = fit_power_law(n, 2.0 * n ** -0.4, bootstrap=50)
    assert fit["budgets"] == 4
    assert fit["reliable"] is False and fit["unreliable_because"] == ["4 budgets, fewer than 5"]
    n5 = np.array([100, 200, 400, 800, 1600])
    fit = fit_power_law(n5, 2.0 * n5 ** -0.4, bootstrap=50)
    assert fit["reliable"] is True and fit["unreliable_because"] == []


def test_interval_holding_zero_is_unreliable():
    rng = np.random.default_rng(5)
    n = np.repeat([50, 100, 200, 400, 800, 1600], 3)
    flat = 0.2 * np.exp(rng.normal(0, 0.3, n.size))  # error does not fall with n
    # reference: scipy.stats.linregress's t interval of the slope holds 0 for these points
    ref = stats.linregress(np.log(n), np.log(flat))
    half = stats.t.ppf(0.975, n.size - 2) * ref.stderr
    assert ref.slope - half < 0 < ref.slope + half
    fit = fit_power_law(n, flat, bootstrap=300)
    assert fit["alpha_low"] <= 0 <= fit["alpha_high"]
    assert fit["reliable"] is False and fit["unreliable_because"] == ["the interval of alpha holds 0"]
    falling = 2.0 * n ** -0.3 * np.exp(rng.normal(0, 0.05, n.size))
    ref = stats.linregress(np.log(n), np.log(falling))
    assert ref.slope + stats.t.ppf(0.975, n.size - 2) * ref.stderr < 0  # scipy: clearly falling
    assert fit_power_law(n, falling, bootstrap=300)["reliable"] is True

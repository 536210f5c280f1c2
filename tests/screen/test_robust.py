"""Robust statistics of PAT against numpy/scipy on the same data."""

from __future__ import annotations

import math

import numpy as np
import pytest
from scipy import stats

from station.screen import robust


def test_iqr_matches_scipy() -> None:
    rng = np.random.default_rng(3)
    for n in (5, 31, 1000):
        data = rng.standard_t(3, size=n) * 1e-5
        # scipy.stats.iqr, default linear interpolation (scipy documentation)
        assert robust.iqr(data) == pytest.approx(stats.iqr(data), rel=1e-12)


def test_over_range_values_are_left_out() -> None:
    data = np.array([1.0, 2.0, 3.0, 4.0, math.inf, -math.inf, math.nan])
    assert robust.iqr(data) == pytest.approx(stats.iqr([1.0, 2.0, 3.0, 4.0]))
    w = robust.window(data, 6)
    assert w.count == 4 and w.median == 2.5


def test_factor_is_twice_the_normal_quartile() -> None:
    # 1.35 = 2 x 0.6745, the upper quartile of the standard normal (scipy.stats.norm.ppf(0.75))
    assert robust.IQR_PER_SIGMA == pytest.approx(2 * stats.norm.ppf(0.75), abs=0.005)


def test_robust_sigma_of_a_large_normal_sample_is_within_its_sampling_error() -> None:
    rng = np.random.default_rng(11)
    n, sigma = 20000, 15e-6
    data = rng.normal(3e-6, sigma, size=n)
    # Relative standard error of IQR-based sigma: 1.166/sqrt(n) (asymptotic variance of sample
    # quantiles, from memory); the divisor 1.35 instead of 1.349 adds a 0.07 % bias.
    se = robust.sigma_rel_se(n) * sigma
    assert abs(robust.robust_sigma(data) - sigma) < 4 * se + 0.001 * sigma
    # the same value as scipy's own normal-scaled IQR, up to 1.35 vs 1.349
    assert robust.robust_sigma(data) == pytest.approx(stats.iqr(data, scale="normal"), rel=0.001)


def test_sampling_error_formula_holds_by_simulation() -> None:
    rng = np.random.default_rng(5)
    n = 200
    estimates = [robust.robust_sigma(rng.normal(size=n)) * 1.35 / (2 * stats.norm.ppf(0.75)) for _ in range(2000)]
    assert np.std(estimates) == pytest.approx(robust.sigma_rel_se(n), rel=0.1)


def test_window_is_median_plus_minus_k_sigma() -> None:
    data = np.arange(101, dtype=float)
    w = robust.window(data, 6)
    assert w.median == 50.0
    assert w.robust_sigma == pytest.approx(50.0 / 1.35)
    assert (w.low, w.high) == pytest.approx((50 - 6 * 50 / 1.35, 50 + 6 * 50 / 1.35))

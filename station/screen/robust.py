"""Robust location and spread for outlier screening: median and IQR-based sigma.

PAT sets its window at median +- k robust sigma, robust sigma = IQR / 1.35 (AEC-Q001, from
memory). For a normal population IQR = 2 x 0.6745 sigma = 1.349 sigma (0.6745 is the normal
upper quartile, scipy.stats.norm.ppf(0.75)); the guideline rounds that to 1.35.
"""

from __future__ import annotations

import math
from dataclasses import dataclass

import numpy as np

IQR_PER_SIGMA = 1.35
# Relative standard error of IQR/1.349 as a sigma estimate for a normal sample of n:
# 1.166 / sqrt(n), from the asymptotic variance of sample quantiles (from memory); it says
# why a baseline of a few parts gives limits that move a lot from lot to lot.
SIGMA_REL_SE_SQRT_N = 1.166


@dataclass(frozen=True)
class RobustWindow:
    count: int
    median: float
    robust_sigma: float
    low: float
    high: float


def finite(values: object) -> np.ndarray:
    data = np.asarray(values, dtype=float).ravel()
    return data[np.isfinite(data)]


def iqr(values: object) -> float:
    """Q3 - Q1 with linear interpolation between order statistics (numpy's and scipy's default)."""
    data = finite(values)
    if data.size == 0:
        return math.nan
    q1, q3 = np.percentile(data, [25.0, 75.0])
    return float(q3 - q1)


def robust_sigma(values: object) -> float:
    return iqr(values) / IQR_PER_SIGMA


def window(values: object, k: float) -> RobustWindow:
    """median +- k robust sigma of the finite values (over-range readings are left out)."""
    data = finite(values)
    if data.size == 0:
        return RobustWindow(0, math.nan, math.nan, math.nan, math.nan)
    median = float(np.median(data))
    sigma = robust_sigma(data)
    return RobustWindow(int(data.size), median, sigma, median - k * sigma, median + k * sigma)


def sigma_rel_se(count: int) -> float:
    """Relative standard error of the robust sigma from `count` normal values."""
    return SIGMA_REL_SE_SQRT_N / math.sqrt(count) if count > 0 else math.inf

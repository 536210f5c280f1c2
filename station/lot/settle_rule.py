"""When is a loop reading settled? Pure functions over readings, for station/site_readings.

Noise-derived settling ("stable_within: auto"): the station measures the spread of repeated
readings itself, and a reading group counts as settled when the residual an exponential
approach predicts for it is below k times the noise of that group. For an approach
`c + a exp(-t / tail)`, two groups `dt` apart differ by `d`, and the group taken last still
carries `|d| q / (1 - q)` with `q = exp(-dt / tail)` (a geometric series of what is left).
"""

from __future__ import annotations

import math
import statistics
from collections.abc import Iterable, Sequence


def noise_from_samples(samples: Sequence[float]) -> float | None:
    """RMS noise of one sample from back-to-back samples, by the mean square successive
    difference (von Neumann): a slow drift left in the samples barely inflates it."""
    values = [v for v in samples if math.isfinite(v)]
    if len(values) < 3:
        return None
    diffs = [b - a for a, b in zip(values, values[1:], strict=False)]
    return math.sqrt(math.fsum(d * d for d in diffs) / (2.0 * len(diffs)))


def typical_noise(per_site: Iterable[float | None]) -> float | None:
    """The median over sites: one noisy or defective part must not set everyone's tolerance."""
    values = [v for v in per_site if v is not None and math.isfinite(v) and v > 0]
    return statistics.median(values) if values else None


def tail_factor(interval_s: float, tail_s: float) -> float:
    """q / (1 - q) for q = exp(-interval / tail): residual left per unit of last difference."""
    if tail_s <= 0:
        return 0.0
    q = math.exp(-max(interval_s, 1e-6) / tail_s)
    return q / (1.0 - q)


def predicted_residual(last: float, previous: float, interval_s: float, tail_s: float) -> float:
    """Settling error still in `last`, from its difference to the group `interval_s` before."""
    if not (math.isfinite(last) and math.isfinite(previous)):
        return 0.0  # an overloaded site cannot settle; it must not hold the others up
    return abs(last - previous) * tail_factor(interval_s, tail_s)


def group_tolerance(sigmas: float, sample_noise: float, samples: int) -> float:
    """k times the noise of the mean of `samples` readings."""
    return sigmas * sample_noise / math.sqrt(samples)


def mean(values: Sequence[float]) -> float:
    """Mean of a reading group; an overloaded sample makes the whole group over-range."""
    if any(math.isinf(v) for v in values):
        return math.inf
    return math.fsum(values) / len(values)

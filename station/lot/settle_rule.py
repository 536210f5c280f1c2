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


# --- predicted settling (a known approach shape, station/config/approach.py) -------------
#
# After a relay moves from a settled state, the node's error is d * g(t) with the unknown
# step d and the characterised envelope g(t) = (1 - s) exp(-t / tau) + s exp(-t / tail),
# t from the approach's start. One early sample (a window average over [a, b]) measures
# d * (1 - h) with h the window average of g, so |d| <= (|probe - before| + slack) / (1 - h);
# the reading then starts once |d| g(t) is below the tolerance. Every assumption errs late:
# the approach is taken to start at the relay command's acknowledgement plus the relay time,
# the probe's window to start when its query is sent (earlier than the instrument starts it,
# so h is overstated and d with it), and the envelope at a window's start bounds its average.

PREDICT_Z = 3.0             # noise allowance of the step bound, in sigmas (one-sided, 0.13 %)
NOISE_TEMPERATURE_K = 290.0  # the IEEE reference temperature for noise (common practice, no source)
BOLTZMANN_J_PER_K = 1.380649e-23  # CODATA 2018, exact


def envelope(t: float, tau: float, tail: float, share: float) -> float:
    """g(t): the share of an error step still present `t` after the approach starts."""
    if t <= 0:
        return 1.0
    return (1.0 - share) * math.exp(-t / tau) + share * math.exp(-t / tail)


def window_envelope(a: float, b: float, tau: float, tail: float, share: float) -> float:
    """The average of g over [a, b] (g = 1 before the start)."""
    if b <= a:
        return envelope(a, tau, tail, share)
    held = max(0.0, min(b, 0.0) - a)               # the part of the window before the start
    lo = max(a, 0.0)
    decaying = 0.0
    if b > lo:
        for amp, constant in ((1.0 - share, tau), (share, tail)):
            decaying += amp * constant * (math.exp(-lo / constant) - math.exp(-b / constant))
    return (held + decaying) / (b - a)


def step_bound(probe: float, before: float, probe_share: float, slack: float) -> float:
    """Upper bound of |d| from a probe that still carries `probe_share` of it (inf if unknown)."""
    if not (math.isfinite(probe) and math.isfinite(before)) or probe_share >= 1.0:
        return math.inf
    return (abs(probe - before) + slack) / (1.0 - probe_share)


def predicted_wait(bound: float, tolerance: float, tau: float, tail: float, share: float) -> float:
    """The least t with bound * g(t) <= tolerance (inf if the bound is unknown)."""
    if not math.isfinite(bound) or tolerance <= 0:
        return math.inf
    if bound <= tolerance:
        return 0.0
    lo, hi = 0.0, max(tau, tail)
    while bound * envelope(hi, tau, tail, share) > tolerance:
        hi *= 2.0
    for _ in range(50):
        mid = 0.5 * (lo + hi)
        lo, hi = (mid, hi) if bound * envelope(mid, tau, tail, share) > tolerance else (lo, mid)
    return hi


def johnson_rms(r_ohm: float, integration_s: float, temperature_k: float = NOISE_TEMPERATURE_K) -> float:
    """RMS of the Johnson noise sqrt(4kTR) of `r_ohm` averaged over `integration_s` (a white
    density e over T gives e / sqrt(2T)); a lower bound of the noise it adds to a reading."""
    if r_ohm <= 0 or integration_s <= 0:
        return 0.0
    return math.sqrt(4.0 * BOLTZMANN_J_PER_K * temperature_k * r_ohm / (2.0 * integration_s))

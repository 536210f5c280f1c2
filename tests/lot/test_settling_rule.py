"""Noise-derived settling: the pure rule (station/settle_rule) and the sequence option."""

from __future__ import annotations

import math

import numpy as np
import pytest

from station.config.files import ConfigError
from station.config.sequence import parse_sequence
from station.lot.settle_rule import (
    group_tolerance,
    noise_from_samples,
    predicted_residual,
    tail_factor,
    typical_noise,
)


def test_noise_from_samples_matches_numpy_std_and_ignores_a_slow_drift():
    rng = np.random.default_rng(5)
    white = rng.normal(0.0, 2e-6, 4000)
    # The successive-difference estimate (von Neumann's mean square successive difference,
    # Annals of Mathematical Statistics 12, 1941; from memory) agrees with numpy's standard
    # deviation (the reference library) on white noise.
    assert noise_from_samples(white.tolist()) == pytest.approx(float(np.std(white)), rel=0.05)
    drift = white + np.linspace(0.0, 1e-3, white.size)  # a ramp 500 sigma high over the record
    assert noise_from_samples(drift.tolist()) == pytest.approx(2e-6, rel=0.06)
    assert float(np.std(drift)) > 50 * 2e-6  # a plain std would be ruined by it
    assert noise_from_samples([1.0, math.inf, 2.0]) is None


def test_typical_noise_is_the_median_over_sites():
    assert typical_noise([1e-6, 2e-6, 50e-6, None]) == pytest.approx(2e-6)
    assert typical_noise([None, math.inf]) is None


@pytest.mark.parametrize("tau", [0.01, 0.03, 0.1])
def test_predicted_residual_is_exact_for_an_exponential_approach(tau):
    # y_k = c + a q^k: the residual left in y_k is a q^k, and the geometric series of the
    # remaining differences gives |y_k - y_(k-1)| q / (1 - q) for it (sum of a geometric series:
    # arithmetic; docs/methods.md "The noise-derived rule").
    c, a, dt = 3e-3, -2e-4, 0.02
    q = math.exp(-dt / tau)
    ys = [c + a * q**k for k in range(6)]
    for k in range(1, 6):
        assert predicted_residual(ys[k], ys[k - 1], dt, tau) == pytest.approx(abs(a) * q**k, rel=1e-9)


def test_tail_factor_and_tolerance():
    assert tail_factor(0.02, 0.04) == pytest.approx(math.exp(-0.5) / (1 - math.exp(-0.5)))
    assert tail_factor(0.02, 0.0) == 0.0
    assert predicted_residual(math.inf, 1.0, 0.02, 0.04) == 0.0  # over-range never holds others up
    assert group_tolerance(2.0, 1e-7, 4) == pytest.approx(1e-7)


SEQUENCE = """
sequence: s
product: P
supply: {span: 10 V}
settle: SETTLE
tests:
  - kind: offset
"""


def test_sequence_accepts_auto_settling_and_keeps_the_absolute_form():
    auto = parse_sequence(SEQUENCE.replace("SETTLE", "{stable_within: auto, sigmas: 1.5, tail: 30 ms, max: 0.2 s}"))
    settle = auto.tests[0].settle
    assert settle.auto and settle.adaptive
    assert (settle.sigmas, settle.tail_s, settle.max_s) == (1.5, pytest.approx(0.03), pytest.approx(0.2))
    default = parse_sequence(SEQUENCE.replace("SETTLE", "{stable_within: auto}")).tests[0].settle
    assert (default.sigmas, default.tail_s) == (2.0, pytest.approx(0.04))
    absolute = parse_sequence(SEQUENCE.replace("SETTLE", "{stable_within: 0.2 uV}")).tests[0].settle
    assert absolute.adaptive and not absolute.auto and absolute.stable_rti_v == pytest.approx(0.2e-6)
    fixed = parse_sequence(SEQUENCE.replace("SETTLE", "{wait: 50 ms}")).tests[0].settle
    assert not fixed.adaptive and fixed.wait_s == pytest.approx(0.05)


@pytest.mark.parametrize("settle, words", [
    ("{stable_within: 0.2 uV, sigmas: 2}", "'sigmas' applies only"),
    ("{wait: 5 ms, tail: 30 ms}", "'tail' applies only"),
    ("{stable_within: auto, sigmas: 0}", "above zero"),
    ("{stable_within: auto, tail: -1 ms}", "above zero"),
])
def test_sequence_refuses_bad_auto_settling(settle, words):
    with pytest.raises(ConfigError, match=words):
        parse_sequence(SEQUENCE.replace("SETTLE", settle))

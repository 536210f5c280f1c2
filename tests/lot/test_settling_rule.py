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


# --- predicted settling (bias_current's predict:) ----------------------------------------

SHAPE = dict(tau=5e-3, tail=60e-3, share=0.01)


@pytest.mark.parametrize("a, b", [(0.0, 0.02), (0.003, 0.023), (-0.001, 0.019), (0.05, 0.07)])
def test_window_envelope_is_the_average_of_the_envelope(a, b):
    from scipy.integrate import quad  # numerical integration as the outside check

    from station.lot.settle_rule import envelope, window_envelope

    expected = quad(lambda t: envelope(t, SHAPE["tau"], SHAPE["tail"], SHAPE["share"]), a, b,
                    points=[0.0] if a < 0 < b else None)[0] / (b - a)
    assert window_envelope(a, b, SHAPE["tau"], SHAPE["tail"], SHAPE["share"]) == pytest.approx(expected, rel=1e-9)


def test_step_bound_recovers_the_step_from_an_early_window():
    from station.lot.settle_rule import step_bound, window_envelope

    # A node approaching `new` from `before`: its 20 ms window average carries h of the step.
    before, new = 10e-6, 210e-6
    h = window_envelope(0.0, 0.02, SHAPE["tau"], SHAPE["tail"], SHAPE["share"])
    probe = new + (before - new) * h
    assert step_bound(probe, before, h, 0.0) == pytest.approx(abs(new - before), rel=1e-12)
    assert step_bound(probe, before, h, 1e-6) > abs(new - before)       # slack only widens it
    assert step_bound(math.inf, before, h, 0.0) == math.inf             # overload: unknown


def test_predicted_wait_is_the_first_time_the_envelope_is_inside_the_tolerance():
    from station.lot.settle_rule import envelope, predicted_wait

    bound, tolerance = 300e-6, 3e-6
    wait = predicted_wait(bound, tolerance, SHAPE["tau"], SHAPE["tail"], SHAPE["share"])
    g = lambda t: bound * envelope(t, SHAPE["tau"], SHAPE["tail"], SHAPE["share"])  # noqa: E731
    assert g(wait) <= tolerance * (1 + 1e-9) and g(wait * 0.999) > tolerance
    # the RC part alone would need tau ln(0.99 bound / tol) = 23 ms; the 1 % tail is at 3 uV
    # itself, so here the tail sets the wait, well beyond the RC time
    assert wait > 5e-3 * math.log(0.99 * bound / tolerance)
    assert predicted_wait(1e-6, tolerance, SHAPE["tau"], SHAPE["tail"], SHAPE["share"]) == 0.0
    assert predicted_wait(math.inf, tolerance, SHAPE["tau"], SHAPE["tail"], SHAPE["share"]) == math.inf


def test_johnson_noise_of_a_kilohm():
    from scipy import constants

    from station.lot.settle_rule import johnson_rms

    # 1 kOhm at 290 K: sqrt(4kTR) = 4.0 nV/rtHz (common practice, no source; k from scipy);
    # averaged over T = 20 ms the RMS is that density / sqrt(2T)
    density = math.sqrt(4 * constants.k * 290.0 * 1e3)
    assert density == pytest.approx(4.0e-9, rel=0.01)
    assert johnson_rms(1e3, 0.02) == pytest.approx(density / math.sqrt(0.04), rel=1e-9)
    assert johnson_rms(0.0, 0.02) == 0.0

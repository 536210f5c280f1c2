"""Measurement math: loop gain, least-squares slopes, region figures, AOL and PSRR."""

from __future__ import annotations

import math

import numpy as np
import pytest
from hypothesis import given
from hypothesis import strategies as st
from scipy import stats

from station.config.rail_points import RailPoint
from station.config.regions import Region, fixed_region
from station.judge.measure import (
    Figure,
    MeasurementError,
    aol_figures,
    cmrr_figures,
    endpoint_slope,
    least_squares_slope,
    loop_gain,
    points_per_region,
    psrr_figures,
    region_of,
    region_point_problems,
    vos_from_loop,
)

# PX-401-like regions at a 10 V span (invented demo product): low pair, crossover, high pair.
# Written at fixed voltages (mid-referenced), so the span passed along changes nothing.
REGIONS = (fixed_region("low", "slope", -5.1, 3.4), fixed_region("transition", "step", 3.4, 4.0),
           fixed_region("high", "slope", 4.0, 5.1))
SPAN = 10.0
WIDE = (fixed_region("low", "slope", -5.1, 5.1),)


def by_key(figures: list[Figure]) -> dict[tuple[str, str | None], Figure]:
    return {(f.param, f.region): f for f in figures}


def test_loop_gain_is_one_plus_rf_over_rs():
    # Servo-loop gain 1 + Rf/Rs (MIL-STD-883 TM 4001, method number from memory; docs/methods.md
    # "The servo loop"): Rf = 100 kOhm, Rs = 100 Ohm gives 1001 (arithmetic), not 1000.
    assert loop_gain(100e3, 100.0) == pytest.approx(1001.0)
    with pytest.raises(MeasurementError):
        loop_gain(100e3, 0.0)


def test_vos_from_loop_divides_and_keeps_overrange():
    assert vos_from_loop(1001 * 25e-6, 1001.0) == pytest.approx(25e-6)
    assert vos_from_loop(math.inf, 1001.0) == math.inf
    assert vos_from_loop(-math.inf, 1001.0) == -math.inf


def test_slope_matches_numpy_polyfit_on_random_data():
    rng = np.random.default_rng(401)
    for _ in range(20):
        n = int(rng.integers(2, 30))
        x = rng.uniform(-5.1, 5.1, n)
        y = rng.normal(0, 20e-6, n) + rng.normal(0, 1e-6) * x
        if np.ptp(x) == 0:
            continue
        # Reference library: numpy.polyfit (degree 1) and scipy.stats.linregress.
        expected = np.polyfit(x, y, 1)[0]
        assert least_squares_slope(list(x), list(y)) == pytest.approx(expected, rel=1e-9, abs=1e-18)
        if n > 2:
            assert least_squares_slope(list(x), list(y)) == pytest.approx(
                stats.linregress(x, y).slope, rel=1e-9, abs=1e-18)


@given(slope=st.floats(-1e-3, 1e-3), intercept=st.floats(-1e-3, 1e-3),
       xs=st.lists(st.floats(-10, 10), min_size=2, max_size=20, unique=True))
def test_slope_of_an_exact_line_is_recovered(slope, intercept, xs):
    if max(xs) - min(xs) < 1e-3:
        return  # too little spread to resolve a slope in floating point
    ys = [intercept + slope * x for x in xs]
    assert least_squares_slope(xs, ys) == pytest.approx(slope, rel=1e-6, abs=1e-12)


def test_slope_needs_two_distinct_points():
    with pytest.raises(MeasurementError, match="at least 2 points"):
        least_squares_slope([1.0], [2e-6])
    with pytest.raises(MeasurementError, match="all x are equal"):
        least_squares_slope([1.0, 1.0, 1.0], [1e-6, 2e-6, 3e-6])


def test_overrange_point_makes_the_slope_overrange():
    assert least_squares_slope([0.0, 1.0, 2.0], [0.0, math.inf, 1e-6]) == math.inf
    assert least_squares_slope([0.0, 1.0, 2.0], [0.0, math.nan, 1e-6]) == math.inf


def test_endpoint_slope_uses_the_two_ends():
    assert endpoint_slope([-5.0, 0.0, 5.0], [0.0, 99.0, 10e-6]) == pytest.approx(1e-6)


@pytest.mark.parametrize("vcm, region", [
    (-5.1, "low"),          # bottom of the lowest region is inside it
    (3.4, "transition"),    # a boundary belongs to the region above it (half-open)
    (3.3999999, "low"),
    (4.0, "high"),
    (5.1, "high"),          # the topmost region is closed at its top
    (5.2, None),
    (-5.2, None),
])
def test_region_of_at_boundaries(vcm, region):
    assert region_of(vcm, REGIONS, SPAN) == region


def test_region_of_forgives_float_noise_at_a_boundary():
    # 5 - 1.6 computed in floating point must still land in the transition region.
    assert region_of(3.4 - 1e-12, REGIONS, SPAN) == "transition"


def test_points_per_region_counts_every_region():
    points = [-5.1, 0.0, 3.4, 3.7, 4.0, 5.1, 6.0]
    assert points_per_region(points, REGIONS, SPAN) == {"low": 2, "transition": 2, "high": 2}
    assert points_per_region([-5.0], REGIONS, SPAN) == {"low": 1, "transition": 0, "high": 0}


def test_cmrr_figures_per_region_and_full_range():
    rng = np.random.default_rng(7)
    vcm = [-5.1, -3.0, 0.0, 3.0, 3.4, 3.7, 4.0, 4.5, 5.1]
    low_slope, high_slope, step = 0.2e-6, -3e-6, 80e-6
    vos = []
    for v in vcm:
        if v < 3.4:
            vos.append(10e-6 + low_slope * v)
        elif v < 4.0:
            vos.append(10e-6 + low_slope * 3.4 + step * (v - 3.4) / 0.6)
        else:
            vos.append(10e-6 + low_slope * 3.4 + step + high_slope * (v - 4.0))
    vos = [y + rng.normal(0, 1e-9) for y in vos]
    figs = by_key(cmrr_figures(vcm, vos, REGIONS, SPAN))
    low_x = [v for v in vcm if v < 3.4]
    low_y = vos[:len(low_x)]
    # Reference library: numpy.polyfit for the region slope.
    assert figs[("cmrr_slope", "low")].value == pytest.approx(np.polyfit(low_x, low_y, 1)[0])
    assert figs[("cmrr_slope", "low")].units == "V/V"
    # Formula: CMRR_dB = -20 log10 |slope| (common practice, no source; docs/methods.md "cm_sweep").
    assert figs[("cmrr", "low")].value == pytest.approx(-20 * math.log10(abs(figs[("cmrr_slope", "low")].value)))
    assert figs[("cmrr_slope", "high")].value == pytest.approx(high_slope, rel=1e-2)
    assert figs[("cmrr_slope", "high")].value < 0  # signed slope kept; dB positive
    assert figs[("cmrr", "high")].value > 0
    trans = [y for v, y in zip(vcm, vos, strict=True) if 3.4 <= v < 4.0]
    assert figs[("cm_step", "transition")].value == pytest.approx(max(trans) - min(trans))
    assert figs[("vos_worst", "transition")].value == pytest.approx(max(abs(y) for y in trans))
    assert figs[("cm_step", "transition")].units == "V"
    full = (vos[-1] - vos[0]) / (vcm[-1] - vcm[0])  # end-point slope over the whole range
    assert figs[("cmrr_slope", "full")].value == pytest.approx(full)
    assert figs[("cmrr", "full")].value == pytest.approx(-20 * math.log10(abs(full)))
    assert ("cmrr", "transition") not in figs and ("cm_step", "low") not in figs


@pytest.mark.parametrize("slope, db", [
    (0.2e-6, 133.98),   # common practice, no source: 0.2 uV/V is 134 dB
    (10e-6, 100.0),     # common practice, no source: 10 uV/V is 100 dB
    (-40e-6, 87.96),    # common practice, no source: 40 uV/V is 87.96 dB (sign does not matter)
])
def test_cmrr_db_check_values(slope, db):
    vcm = [-5.0, -2.0, 1.0, 3.0]
    vos = [slope * v for v in vcm]
    figs = by_key(cmrr_figures(vcm, vos, WIDE, SPAN))
    assert figs[("cmrr", "low")].value == pytest.approx(db, abs=0.005)
    assert figs[("cmrr", "full")].value == pytest.approx(db, abs=0.005)


def test_zero_slope_is_infinite_rejection():
    figs = by_key(cmrr_figures([-1.0, 1.0], [5e-6, 5e-6], WIDE, SPAN))
    assert figs[("cmrr", "low")].value == math.inf


def test_overrange_point_in_region_makes_cmrr_fail_side():
    figs = by_key(cmrr_figures([-1.0, 0.0, 1.0], [0.0, math.inf, 1e-6],
                               WIDE, SPAN))
    assert figs[("cmrr_slope", "low")].value == math.inf
    assert figs[("cmrr", "low")].value == -math.inf  # below any lower limit


def test_slope_region_with_one_point_is_refused_by_name():
    vcm = [-5.1, 0.0, 3.4, 3.7, 5.1]
    with pytest.raises(MeasurementError, match=r"region 'high' has 1 common-mode point; it needs at least 2"):
        cmrr_figures(vcm, [0.0] * len(vcm), REGIONS, SPAN)


def test_step_region_with_no_point_is_refused_by_name():
    vcm = [-5.1, 0.0, 4.0, 5.1]
    with pytest.raises(MeasurementError, match=r"region 'transition' has 0 common-mode points"):
        cmrr_figures(vcm, [0.0] * len(vcm), REGIONS, SPAN)


def test_repeated_points_do_not_count_as_a_slope():
    problems = region_point_problems([4.5, 4.5, -1.0, 0.0, 3.5], REGIONS, SPAN)
    assert problems == ["region 'high' has 1 distinct common-mode point (2 in all); it needs at least 2"]


def test_aol_check_value():
    # Common practice, no source: a 10 V output change over 1.6 uV referred to the input
    # is AOL = 6.25e6 V/V.
    figs = by_key(aol_figures([-5.0, 5.0], [0.8e-6, -0.8e-6]))
    assert figs[("aol_slope", None)].value == pytest.approx(-1.6e-7)
    assert 10 ** (figs[("aol", None)].value / 20) == pytest.approx(6.25e6)
    assert figs[("aol", None)].units == "dB"


def test_aol_overrange_fails_low_side():
    figs = by_key(aol_figures([-5.0, 0.0, 5.0], [0.0, math.inf, 0.0]))
    assert figs[("aol", None)].value == -math.inf


def test_psrr_slope_and_db():
    spans = [9.0, 10.0, 11.0]
    vos = [1e-6 + 10e-6 * (s - 10.0) for s in spans]
    figs = by_key(psrr_figures(spans, vos))
    assert figs[("psrr_slope", None)].value == pytest.approx(10e-6)
    assert figs[("psrr", None)].value == pytest.approx(100.0)  # common practice, no source: 10 uV/V is 100 dB
    with pytest.raises(MeasurementError):
        psrr_figures([10.0], [1e-6])


def test_rail_relative_regions_move_with_the_span():
    # The demo table's transition region, written against V+: 1.6 V to 1.0 V below it.
    transition = Region("transition", "step", RailPoint("V+", -1.6), RailPoint("V+", -1.0))
    below = Region("low", "slope", RailPoint("V-", -0.1), RailPoint("V+", -1.6))
    regions = (below, transition)
    # At 10 V the top rail sits 5 V above mid, at 20 V 10 V above it (rails_for's convention).
    assert region_of(3.7, regions, 10.0) == "transition"
    assert region_of(3.7, regions, 20.0) == "low"
    assert region_of(8.7, regions, 20.0) == "transition"
    assert points_per_region([3.5, 3.7, 8.5], regions, 20.0) == {"low": 2, "transition": 1}

"""Measurement math, referred to the input: loop gain, slopes, and the figures of each sweep.

Pure functions over plain numbers (V, V/V, dB); no instruments, no files. Conventions:

- An over-range reading (the DMM's overload, carried as +-inf) or a nan makes every figure
  computed from it over-range: a slope over such a point is +inf V/V, and its rejection in dB
  is -inf, which fails any lower limit. A figure is never silently computed around a bad point.
- An exactly zero slope gives +inf dB (perfect rejection), as station.config.quantities defines it.
"""

from __future__ import annotations

import math
from collections.abc import Sequence
from dataclasses import dataclass

from station.config.parameters import FULL_RANGE
from station.config.quantities import rejection_db
from station.config.regions import Region, RegionKind

# Common-mode points sit on region boundaries by design; computed VCMs carry float noise
# (5 - 1.6 is not exactly 3.4), so a point within this distance of a boundary counts as on it.
BOUNDARY_TOLERANCE_V = 1e-9

# Fewest points per region kind: a slope needs two distinct VCMs, a step at least one reading.
MIN_POINTS: dict[RegionKind, int] = {"slope": 2, "step": 1}


class MeasurementError(ValueError):
    """The readings cannot give the figure asked for (too few points, no spread in x)."""


@dataclass(frozen=True)
class Figure:
    """A computed figure: `param` names a row of station.config.parameters.PARAMETERS."""

    param: str
    region: str | None
    value: float
    units: str


def loop_gain(rf_ohm: float, rs_ohm: float) -> float:
    """Gain of the servo loop's measurement node: 1 + Rf/Rs (100 kOhm / 100 Ohm gives 1001)."""
    if not rs_ohm > 0 or not rf_ohm >= 0:
        raise MeasurementError(f"loop resistors must be Rf >= 0 and Rs > 0, got Rf={rf_ohm!r}, Rs={rs_ohm!r}")
    return 1.0 + rf_ohm / rs_ohm


def vos_from_loop(v_node: float, gain: float) -> float:
    """Input offset from the loop-node reading: Vmeas / G. Over-range (inf) stays over-range."""
    if not gain > 0:
        raise MeasurementError(f"loop gain must be positive, got {gain!r}")
    return v_node / gain


def least_squares_slope(x: Sequence[float], y: Sequence[float]) -> float:
    """Least-squares slope dy/dx. Any non-finite y (over-range) gives +inf, see module notes."""
    if len(x) != len(y):
        raise MeasurementError(f"{len(x)} x values but {len(y)} y values")
    if len(x) < 2:
        raise MeasurementError(f"a slope needs at least 2 points, got {len(x)}")
    if not all(math.isfinite(v) for v in x):
        raise MeasurementError("the swept values (x) must be finite")
    if max(x) == min(x):
        raise MeasurementError("a slope needs at least 2 distinct x values; all x are equal")
    if not all(math.isfinite(v) for v in y):
        return math.inf
    # Centred sums: the means are large next to the spread (uV offsets on volts of sweep).
    mean_x = math.fsum(x) / len(x)
    mean_y = math.fsum(y) / len(y)
    sxx = math.fsum((a - mean_x) ** 2 for a in x)
    sxy = math.fsum((a - mean_x) * (b - mean_y) for a, b in zip(x, y, strict=True))
    return sxy / sxx


def endpoint_slope(x: Sequence[float], y: Sequence[float]) -> float:
    """Slope between the points at the lowest and the highest x (several at one x: their mean).

    Any non-finite y anywhere in the sweep gives +inf: a full-range figure covers every point.
    """
    if len(x) != len(y):
        raise MeasurementError(f"{len(x)} x values but {len(y)} y values")
    if len(x) < 2 or max(x) == min(x):
        raise MeasurementError("an end-point slope needs points at 2 distinct x values")
    if not all(math.isfinite(v) for v in y):
        return math.inf
    lo, hi = min(x), max(x)
    y_lo = [b for a, b in zip(x, y, strict=True) if a == lo]
    y_hi = [b for a, b in zip(x, y, strict=True) if a == hi]
    return (math.fsum(y_hi) / len(y_hi) - math.fsum(y_lo) / len(y_lo)) / (hi - lo)


def region_of(vcm: float, regions: Sequence[Region], span_v: float) -> str | None:
    """Region holding `vcm` at span `span_v`: half-open [lo, hi), the topmost region also
    closed at its top."""
    if not regions:
        return None
    ranges = {r.name: r.vcm_range(span_v) for r in regions}
    top = max(ranges, key=lambda name: ranges[name][1])
    for name, (lo, hi) in ranges.items():
        if lo - BOUNDARY_TOLERANCE_V <= vcm < hi - BOUNDARY_TOLERANCE_V:
            return name
        if name == top and abs(vcm - hi) <= BOUNDARY_TOLERANCE_V:
            return name
    return None


def points_per_region(vcm_points: Sequence[float], regions: Sequence[Region],
                      span_v: float) -> dict[str, int]:
    """How many sweep points fall in each region (every region listed, zero included)."""
    counts = {r.name: 0 for r in regions}
    for vcm in vcm_points:
        name = region_of(vcm, regions, span_v)
        if name is not None:
            counts[name] += 1
    return counts


def region_point_problems(vcm_points: Sequence[float], regions: Sequence[Region],
                          span_v: float) -> list[str]:
    """Why a sweep cannot give every region's figure (empty list: it can). For loaders."""
    problems = []
    for region in regions:
        inside = [v for v in vcm_points if region_of(v, regions, span_v) == region.name]
        usable = len(set(inside)) if region.kind == "slope" else len(inside)
        need = MIN_POINTS[region.kind]
        if usable < need:
            count = f"{usable} common-mode point{'' if usable == 1 else 's'}"
            if usable != len(inside):
                count = f"{usable} distinct common-mode point{'' if usable == 1 else 's'} ({len(inside)} in all)"
            problems.append(f"region {region.name!r} has {count}; it needs at least {need}")
    return problems


def cmrr_figures(vcm: Sequence[float], vos: Sequence[float], regions: Sequence[Region],
                 span_v: float) -> list[Figure]:
    """Figures of a common-mode sweep at span `span_v`: per slope region cmrr_slope + cmrr,
    per step region cm_step + vos_worst, then the full-range end-point cmrr_slope + cmrr.

    Regions come out in the order given (a limit table's: low to high). Raises
    MeasurementError naming the region when a region has too few points.
    """
    if len(vcm) != len(vos):
        raise MeasurementError(f"{len(vcm)} common-mode points but {len(vos)} offset readings")
    problems = region_point_problems(vcm, regions, span_v)
    if problems:
        raise MeasurementError(problems[0])
    figures: list[Figure] = []
    for region in regions:
        name = region.name
        pairs = [(x, y) for x, y in zip(vcm, vos, strict=True) if region_of(x, regions, span_v) == name]
        xs = [p[0] for p in pairs]
        ys = [p[1] for p in pairs]
        if region.kind == "slope":
            slope = least_squares_slope(xs, ys)
            figures.append(Figure("cmrr_slope", name, slope, "V/V"))
            figures.append(Figure("cmrr", name, rejection_db(slope), "dB"))
        elif region.kind == "step":
            figures.append(Figure("cm_step", name, _spread(ys), "V"))
            figures.append(Figure("vos_worst", name, _worst(ys), "V"))
        else:
            raise MeasurementError(f"region {name!r} has unknown kind {region.kind!r}")
    full = endpoint_slope(vcm, vos)
    figures.append(Figure("cmrr_slope", FULL_RANGE, full, "V/V"))
    figures.append(Figure("cmrr", FULL_RANGE, rejection_db(full), "dB"))
    return figures


def diff_cmrr_figures(vcm: Sequence[float], vos: Sequence[float], regions: Sequence[Region],
                      span_v: float) -> list[Figure]:
    """Figures of a difference-amplifier sweep: per slope region holding two distinct points
    cmrr_da_slope + cmrr_da, then the full-range end-point pair (no figure of a step region:
    its offset step is the servo loop's to measure)."""
    if len(vcm) != len(vos):
        raise MeasurementError(f"{len(vcm)} common-mode points but {len(vos)} offset readings")
    figures: list[Figure] = []
    for name in diff_cmrr_regions(vcm, regions, span_v):
        pairs = [(x, y) for x, y in zip(vcm, vos, strict=True) if region_of(x, regions, span_v) == name]
        slope = least_squares_slope([p[0] for p in pairs], [p[1] for p in pairs])
        figures += [Figure("cmrr_da_slope", name, slope, "V/V"), Figure("cmrr_da", name, rejection_db(slope), "dB")]
    full = endpoint_slope(vcm, vos)
    return [*figures, Figure("cmrr_da_slope", FULL_RANGE, full, "V/V"), Figure("cmrr_da", FULL_RANGE, rejection_db(full), "dB")]


def diff_cmrr_regions(vcm: Sequence[float], regions: Sequence[Region], span_v: float) -> list[str]:
    """The slope regions holding at least two distinct points of `vcm`, low to high."""
    return [r.name for r in regions if r.kind == "slope"
            and len({x for x in vcm if region_of(x, regions, span_v) == r.name}) >= 2]


def aol_figures(vout_levels: Sequence[float], vos: Sequence[float]) -> list[Figure]:
    """Open-loop gain from Vos at several commanded outputs: s = dVos/dVout, AOL = 1/|s|."""
    slope = least_squares_slope(vout_levels, vos)
    # 20 log10(1/|s|) is -20 log10 |s|: an over-range s gives -inf dB (fails), s = 0 gives +inf.
    return [Figure("aol_slope", None, slope, "V/V"), Figure("aol", None, rejection_db(slope), "dB")]


def psrr_figures(spans: Sequence[float], vos: Sequence[float]) -> list[Figure]:
    """Supply rejection from Vos at several supply spans: slope dVos/dVs, -20 log10 |slope|."""
    slope = least_squares_slope(spans, vos)
    return [Figure("psrr_slope", None, slope, "V/V"), Figure("psrr", None, rejection_db(slope), "dB")]


def _spread(values: Sequence[float]) -> float:
    if not all(math.isfinite(v) for v in values):
        return math.inf
    return max(values) - min(values)


def _worst(values: Sequence[float]) -> float:
    if not all(math.isfinite(v) for v in values):
        return math.inf
    return max(abs(v) for v in values)


def bias_figures(base: float, plus_open: float, minus_open: float, both_open: float,
                 rb_ohm: float) -> list[Figure]:
    """Bias and offset currents from the loop offset with the shunts across Rb closed (`base`),
    the + shunt open, the - shunt open and both open (MIL-STD-883 method 4001, from memory).

    The loop reads V(-in) - V(+in) at the null, so Rb in the + input adds Ib+ Rb and Rb in the
    - input takes Ib- Rb away (currents flowing into the pins are positive). Ib is the mean of
    the two, Ios = Ib+ - Ib-; with both shunts open the reading moves by Ios Rb, logged as a
    second, independent Ios (the consistency check).
    """
    if not rb_ohm > 0:
        raise MeasurementError(f"bias resistor must be positive, got {rb_ohm!r}")
    ib_plus = (plus_open - base) / rb_ohm
    ib_minus = -(minus_open - base) / rb_ohm
    return [Figure("ib_plus", None, ib_plus, "A"), Figure("ib_minus", None, ib_minus, "A"),
            Figure("ib", None, (ib_plus + ib_minus) / 2.0, "A"), Figure("ios", None, ib_plus - ib_minus, "A"),
            Figure("ios_both", None, (both_open - base) / rb_ohm, "A")]

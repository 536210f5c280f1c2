"""The application error budget of one part (pure): how much input-referred error this very
part adds in a customer's circuit, from its own measured figures.

Four terms, each a magnitude in volts referred to the amplifier's input:

- offset: the part's offset at the application's reference common mode (the low end of the
  input range for a buffer or a non-inverting stage, the fixed common mode of an inverting
  stage): the measured Vos moved there along the part's own swept offset curve;
- common mode: the largest change of the offset from there over the application's input
  range, from the part's swept points (piecewise linear between them, never through a dB
  figure). A range that enters a crossover (transition) region is widened to the whole region,
  so the crossover step counts in full. An inverting stage holds its common mode: no term;
- output: the output change over the application's swing times the part's dVos/dVout
  (the inverse of its open-loop gain);
- bias: the bias current of the input the source drives times the source resistance.

The direct sum is the worst case; the root sum of squares treats the terms as independent.

Another supply than tested: the station tested the part at one span only, and a
rail-to-rail input stage behaves by its distance from the rails (each input pair works up to
a fixed distance from its rail, the crossover sits a fixed distance below V+). So each point
of the application is taken at the tested span at the same distance from the nearer rail of
the application's supply (`refer_to_tested`). For a supply narrower than tested this
stretches a range that spans the middle (conservative: more of the slope is counted); a
supply wider than tested is refused, the part was never tested there.
"""

from __future__ import annotations

import math
from collections.abc import Sequence
from dataclasses import dataclass
from typing import Literal

import numpy as np

Circuit = Literal["buffer", "non_inverting", "inverting"]
TERMS = ("vos", "cm", "out", "ib")


class BudgetError(ValueError):
    """The part's figures cannot give this application's budget (say why)."""


@dataclass(frozen=True)
class Application:
    """One customer circuit; voltages are absolute, in the application's own frame."""

    name: str
    circuit: Circuit
    gain: float                         # |Vout / Vin|; 1 for a buffer
    supply_v: tuple[float, float]       # (V-, V+)
    input_v: tuple[float, float]        # input range, low to high
    source_ohm: float                   # resistance the driven input's bias current flows through
    output_v: tuple[float, float]       # output swing, low to high
    reference_v: float                  # common mode of an inverting stage

    @property
    def span_v(self) -> float:
        return self.supply_v[1] - self.supply_v[0]

    def cm_range_v(self) -> tuple[float, float]:
        """The common mode the amplifier sees, absolute: the input range, or the fixed point."""
        if self.circuit == "inverting":
            return self.reference_v, self.reference_v
        return self.input_v


@dataclass(frozen=True)
class PartFigures:
    """What the budget needs of one part, as the station measured it."""

    vos: float                              # offset at nominal supply, mid common mode (V)
    aol_slope: float                        # dVos / dVout (V/V)
    cm_points: tuple[tuple[float, float], ...]  # (VCM relative to the tested mid, Vos), any order
    ib_plus: float = math.nan               # A; nan when not measured
    ib_minus: float = math.nan


@dataclass(frozen=True)
class Budget:
    vos: float
    cm: float
    out: float
    ib: float

    @property
    def terms(self) -> tuple[float, float, float, float]:
        return (self.vos, self.cm, self.out, self.ib)

    @property
    def direct(self) -> float:
        """Worst case: every term at its limit with the same sign."""
        return float(sum(self.terms))

    @property
    def rss(self) -> float:
        """Root sum of squares: the terms independent."""
        return math.sqrt(sum(t * t for t in self.terms))


def refer_to_tested(v: float, supply_v: tuple[float, float], tested_span_v: float) -> float:
    """An application voltage as a common mode relative to the tested mid-point, at the same
    distance from the nearer rail of the application's supply."""
    v_neg, v_pos = supply_v
    above_neg, below_pos = v - v_neg, v_pos - v
    if above_neg <= below_pos:
        return -tested_span_v / 2.0 + above_neg
    return tested_span_v / 2.0 - below_pos


def check_supply(app: Application, tested_span_v: float) -> None:
    if app.span_v > tested_span_v + 1e-9:
        raise BudgetError(f"application {app.name!r} runs on a {app.span_v:g} V supply, wider than the "
                          f"{tested_span_v:g} V the parts were tested at")


def part_budget(app: Application, part: PartFigures, tested_span_v: float,
                step_regions: Sequence[tuple[float, float]] = ()) -> Budget:
    """The four terms for `part` in `app`. `step_regions`: the (low, high) common mode, relative
    to the tested mid, of each crossover region at the tested span."""
    check_supply(app, tested_span_v)
    vcm, vos = _curve(part.cm_points)
    lo, hi = (refer_to_tested(v, app.supply_v, tested_span_v) for v in app.cm_range_v())
    _inside(app, vcm, lo, hi, 0.0)
    anchor = part.vos - float(np.interp(0.0, vcm, vos))   # the sweep's offset to the measured Vos
    reference = float(np.interp(lo, vcm, vos))
    vos_term = abs(anchor + reference)
    cm_term = 0.0
    if app.circuit != "inverting":
        for r_lo, r_hi in step_regions:    # a range that enters a crossover takes all of it
            if lo <= r_hi and hi >= r_lo:
                lo, hi = min(lo, r_lo), max(hi, r_hi)
        _inside(app, vcm, lo, hi)
        inside = [v for v in vcm if lo < v < hi]
        values = np.interp([lo, hi, *inside], vcm, vos)
        cm_term = float(np.max(np.abs(values - reference)))
    out_term = abs(part.aol_slope) * abs(app.output_v[1] - app.output_v[0])
    ib_term = 0.0
    if app.source_ohm > 0:
        current = part.ib_minus if app.circuit == "inverting" else part.ib_plus
        if math.isnan(current):
            raise BudgetError(f"application {app.name!r} has a source resistance but the part has no "
                              "bias current measured")
        ib_term = abs(current) * app.source_ohm
    return Budget(vos_term, cm_term, out_term, ib_term)


def _curve(points: Sequence[tuple[float, float]]) -> tuple[list[float], list[float]]:
    if len(points) < 2:
        raise BudgetError("the part has fewer than two common-mode points")
    ordered = sorted(points)
    return [p[0] for p in ordered], [p[1] for p in ordered]


def _inside(app: Application, vcm: list[float], lo: float, hi: float, *more: float) -> None:
    """Never extrapolate: every point of the application must lie inside the swept range."""
    for v in (lo, hi, *more):
        if not vcm[0] - 1e-9 <= v <= vcm[-1] + 1e-9:
            raise BudgetError(f"application {app.name!r} needs the offset at VCM {v:+.3f} V (tested span), "
                              f"outside the swept {vcm[0]:+.3f} V to {vcm[-1]:+.3f} V")

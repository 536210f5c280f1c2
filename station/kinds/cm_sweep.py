"""Common-mode sweep: the offset at each common-mode point, and the figures of each region.

Per slope region CMRR (least-squares slope and its dB), per step region the crossover step
and the worst offset, then CMRR over the full range from the end points. The points are
written against the rails; both rails move around the grounded inputs to reach them.
"""

from __future__ import annotations

from collections.abc import Sequence
from typing import TYPE_CHECKING, Annotated, Any

from pydantic import Field, ValidationInfo, model_validator

from station.config.fields import Strict, count, rail_point, refuse
from station.config.files import ConfigError
from station.config.parameters import FULL_RANGE
from station.config.rail_points import RailPoint, rails_for
from station.config.step_spec import MAX_SPAN_V, StepSpec, span_of
from station.config.test_catalog import StepRows
from station.judge.measure import Figure, cmrr_figures, region_of, region_point_problems
from station.kinds.base import KindContext, SweepKind
from station.lot.sweep_order import Condition

if TYPE_CHECKING:
    from station.config.sequence import Sequence as TestSequence
    from station.config.sequence import TestStep

# The figures of each region kind, in the order measure.cmrr_figures gives them.
_REGION_FIGURES = {"slope": (("cmrr_slope", "CMRR slope"), ("cmrr", "CMRR")),
                   "step": (("cm_step", "Crossover offset step"), ("vos_worst", "Worst |Vos|"))}


Point = Annotated[RailPoint, rail_point(MAX_SPAN_V)]
_EXAMPLE_POINTS = "points: ['V- - 0.1 V', 'mid', 'V+ + 0.1 V']"


class SweepRange(Strict):
    """range: {from, to, count}: evenly spaced points between two rail-relative ends."""

    start: Point = Field(alias="from")
    to: Point
    count: Annotated[int, count(2, 1000)]


class SweepSpec(StepSpec):
    points: tuple[Point, ...] | None = None
    span_range: SweepRange | None = Field(None, alias="range")
    swept: tuple[RailPoint, ...] = Field((), exclude=True)   # the points, filled in below

    @model_validator(mode="after")
    def _points(self, info: ValidationInfo) -> SweepSpec:
        if (self.points is None) == (self.span_range is None):
            refuse("a cm_sweep needs either 'points' or 'range', not both", f"e.g. {_EXAMPLE_POINTS}")
        span = span_of(info)
        if self.points is not None:
            if len(self.points) < 2:
                refuse("expected a list of at least two common-mode points", f"e.g. {_EXAMPLE_POINTS}")
            points = self.points
        else:
            rng = self.span_range
            assert rng is not None
            lo, hi = rng.start.vcm(span), rng.to.vcm(span)
            # Points between two rail-relative ends are written relative to the mid-point.
            points = tuple(RailPoint("mid", round(lo + (hi - lo) * k / (rng.count - 1), 9))
                           for k in range(rng.count))
        vcms = [p.vcm(span) for p in points]
        if len(set(vcms)) != len(vcms):
            refuse("two common-mode points are the same voltage", "remove the duplicate")
        object.__setattr__(self, "swept", points)
        return self


class CommonModeSweep(SweepKind):
    name = "cm_sweep"
    title = "Common-mode sweep"
    spec = SweepSpec

    def step_fields(self, spec: SweepSpec) -> dict[str, Any]:
        return {"points": spec.swept}

    def lay_out(self, step: TestStep, rows: StepRows, context: KindContext) -> None:
        vcms = step.point_vcms(context.span_v)
        for point, vcm in zip(step.points, vcms, strict=True):
            rows.raw_point(f"Vos at VCM {vcm:+.3f} V ({point})", "vos_cm",
                           region_of(vcm, context.regions, context.span_v), vcm)
        for region in context.regions:
            for param, text in _REGION_FIGURES[region.kind]:
                rows.figure(f"{text} {region.name} region", param, region.name, None)
        rows.figure("CMRR slope full range", "cmrr_slope", FULL_RANGE, None)
        rows.figure("CMRR full range", "cmrr", FULL_RANGE, None)

    def conditions(self, step: TestStep, span_v: float) -> list[Condition]:
        return [(rails_for(vcm, span_v), 0.0) for vcm in step.point_vcms(span_v)]

    def figures(self, step: TestStep, readings: Sequence[float], context: KindContext) -> list[Figure]:
        return cmrr_figures(list(step.point_vcms(context.span_v)), readings, context.regions, context.span_v)

    def rails(self, step: TestStep, span_v: float) -> list[tuple[str, float, float]]:
        return [(f"common-mode point '{point}'", *rails_for(vcm, span_v))
                for point, vcm in zip(step.points, step.point_vcms(span_v), strict=True)]

    def check(self, step: TestStep, sequence: TestSequence, context: KindContext) -> None:
        """Every point inside a region, and every region with enough points for its figure
        (a slope needs two distinct points, a step one)."""
        vcms = step.point_vcms(context.span_v)
        key = f"tests[{step.index - 1}]"
        for point, vcm in zip(step.points, vcms, strict=True):
            if region_of(vcm, context.regions, context.span_v) is None:
                raise ConfigError(sequence.source, f"common-mode point '{point}' lies outside every "
                                  "region of the limit table", hint="remove it or widen the regions", line=step.line, key=key)
        problems = region_point_problems(vcms, context.regions, context.span_v)
        if problems:
            raise ConfigError(sequence.source, problems[0], hint="add points inside that region", line=step.line, key=key)

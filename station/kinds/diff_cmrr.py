"""DC common-mode rejection in the difference-amplifier fixture.

Both inputs of the fixture are tied to the force source; the part sees the common mode
Vin x G / (1 + G) (Vin/2 at unity gain) and the amplifier's output, held near 0 V, carries the
part's offset times the noise gain 1 + G, so open-loop gain drops out. The sequence writes its
points in the part's common-mode terms, like a cm_sweep (against the rails); the station maps
each to the drive level Vin = VCM (1 + G) / G at the nominal supply. Per slope region the
least-squares CMRR, then the full range from the end points.

The resistors' mismatch adds a common-mode slope of its own in series with the part's: where
the bench config gives a characterised slope per site, it is subtracted from every reading;
the fixture's resolution (station/config/resolution.py) refuses limits beyond it.
"""

from __future__ import annotations

from typing import TYPE_CHECKING, Any

from drivers.force import INSTRUMENT_MAX_V as FORCE_MAX_V
from station.config.files import ConfigError
from station.config.parameters import FULL_RANGE
from station.config.rail_points import rails_for
from station.config.test_catalog import StepRows, StepTests
from station.judge.measure import diff_cmrr_figures, diff_cmrr_regions, region_of
from station.kinds.base import KindContext, SiteWork, StepScreen, TestKind, figure_rows
from station.kinds.cm_sweep import SweepSpec

if TYPE_CHECKING:
    from station.config.bench_config import BenchConfig, DiffAmpFixture
    from station.config.sequence import Sequence as TestSequence
    from station.config.sequence import TestStep


def drive_level(vcm: float, amp: DiffAmpFixture) -> float:
    """The force level on the tied inputs that puts the part at common mode `vcm`."""
    return vcm / amp.cm_share


def part_offset(reading: float, loop_gain: float, amp: DiffAmpFixture, vcm: float, site: int) -> float:
    """The part's input error from one reading: the node (the reader divides by the bench's
    loop gain) over the noise gain 1 + G, less the characterised fixture slope times VCM."""
    return reading * loop_gain / amp.noise_gain - amp.fixture_slope(site) * vcm


class DiffAmpCmrr(TestKind):
    name = "diff_cmrr"
    title = "CMRR in the difference amplifier"
    spec = SweepSpec
    fixture = "diff_amp"

    def step_fields(self, spec: SweepSpec) -> dict[str, Any]:
        return {"points": spec.swept}

    def lay_out(self, step: TestStep, rows: StepRows, context: KindContext) -> None:
        vcms = step.point_vcms(context.span_v)
        for point, vcm in zip(step.points, vcms, strict=True):
            rows.raw_point(f"Vos in the difference amplifier at VCM {vcm:+.3f} V ({point})", "vos_da",
                           region_of(vcm, context.regions, context.span_v), vcm)
        for region in [*diff_cmrr_regions(vcms, context.regions, context.span_v), FULL_RANGE]:
            label = "full range" if region == FULL_RANGE else f"{region} region"
            rows.figure(f"CMRR slope {label} (difference amplifier)", "cmrr_da_slope", region, None)
            rows.figure(f"CMRR {label} (difference amplifier)", "cmrr_da", region, None)

    def run(self, step: TestStep, tests: StepTests, screen: StepScreen, parts: list[SiteWork]) -> None:
        bench = screen.bench_config
        amp = bench.diff_amp
        if amp is None:
            raise ValueError("the bench has no difference amplifier; the plan should have refused this")
        span = screen.context.span_v
        vcms = step.point_vcms(span)
        sites = [p.site for p in parts]
        screen.use_fixture(sites, "diff_amp")
        try:
            values = screen.sweep(step, sites, [(rails_for(0.0, span), drive_level(v, amp)) for v in vcms])
        finally:
            screen.use_fixture(sites, "servo_loop")
        for part in parts:
            vos = [part_offset(r, bench.loop_gain, amp, v, part.site)
                   for r, v in zip(values[part.site], vcms, strict=True)]
            part.raw.extend(zip(tests.raw, vos, strict=True))
            figures = diff_cmrr_figures(vcms, vos, screen.context.regions, span)
            part.figures.extend(figure_rows(figures, tests.figures))

    def check(self, step: TestStep, sequence: TestSequence, context: KindContext) -> None:
        vcms = step.point_vcms(context.span_v)
        key = f"tests[{step.index - 1}]"
        if not diff_cmrr_regions(vcms, context.regions, context.span_v):
            raise ConfigError(sequence.source, "no slope region of the limit table holds two of the points",
                              hint="put at least two points inside a slope region", line=step.line, key=key)

    def check_bench(self, step: TestStep, sequence: TestSequence, bench: BenchConfig) -> None:
        """Every drive level within the force source and the bench's safety limit."""
        amp = bench.diff_amp
        if amp is None:
            return   # the plan's fixture check names what is missing
        limit = min(FORCE_MAX_V, bench.max_rail_v)
        for point, vcm in zip(step.points, step.point_vcms(sequence.span_v), strict=True):
            level = drive_level(vcm, amp)
            if abs(level) > limit + 1e-9:
                raise ConfigError(sequence.source, f"common-mode point '{point}' needs {level:+.3f} V on the "
                                  f"difference amplifier's inputs (gain {amp.gain:g}), beyond {limit:g} V "
                                  "(the force source or the bench's safety limit)",
                                  hint="move the point toward mid-supply, or use a fixture of higher gain",
                                  line=step.line, key=f"tests[{step.index - 1}]")

"""Common-mode rejection versus frequency in the difference-amplifier fixture.

At nominal supply, the force source at 0 V (the part at mid common mode), the function
generator puts a sine of `amplitude` (RMS) on the fixture's tied inputs; for each frequency
point the generator is set (FUNC SIN, FREQ, VOLT), its output on, and every site's DMM reads
the AC amplitude of the amplifier's output after the AC filter that passes that frequency has
settled (the meter waits for it after each trigger). CMRR(f) = G Vin / Vout per point, then the
-3 dB frequency (station/judge/ac_rejection.py). The generator is off on every way out of the
step, and every site back in the servo loop.

The AC reading is a magnitude: the resistor mismatch's (flat, in-phase) term cannot be
separated from the part's rolling-off one, so no characterised slope is subtracted here, and a
limit on cmrr_ac beyond the uncharacterised fixture resolution (1 + G) / (4 t) is refused.
Refused before power too: a frequency outside the generator's range or the DMM's AC band, a
sine whose peak would exceed the bench limit or put the part's common mode beyond the rails,
a -3 dB limit outside the sweep, a cmrr_ac limit at a frequency the sweep lacks.
"""

from __future__ import annotations

import math
from dataclasses import dataclass
from typing import TYPE_CHECKING, Annotated, Any

from pydantic import AfterValidator

from drivers import dmm as dmm_driver
from drivers import generator as gen_driver
from station.config.fields import quantity, refuse
from station.config.files import ConfigError, load_yaml_file
from station.config.rail_points import rails_for
from station.config.step_spec import StepSpec
from station.config.test_catalog import StepRows, StepTests
from station.judge.ac_rejection import (
    cmrr_ac_db,
    frequency_label,
    label_frequency,
    minus_3db_frequency,
)
from station.kinds.base import KindContext, SiteWork, StepScreen, TestKind

if TYPE_CHECKING:
    from station.config.bench_config import BenchConfig
    from station.config.limit_tables import LimitTable
    from station.config.sequence import Sequence as TestSequence
    from station.config.sequence import TestStep

Frequency = Annotated[float, quantity("Hz", gt=0, le=10e6, why="a frequency point is hertz to megahertz")]


def _sorted_distinct(values: tuple[float, ...]) -> tuple[float, ...]:
    if len(values) < 2 or len(set(values)) != len(values) or list(values) != sorted(values):
        refuse("expected at least two different frequency points, low to high",
               "e.g. frequencies: [20 Hz, 100 Hz, 1 kHz, 10 kHz]")
    return values


@dataclass(frozen=True)
class AcSweep:
    """What an ac_cmrr step does: its frequency points and the sine on the tied inputs."""

    frequencies_hz: tuple[float, ...]
    amplitude_vrms: float
    aperture_s: float
    range_v: float


class AcCmrrSpec(StepSpec):
    frequencies: Annotated[tuple[Frequency, ...], AfterValidator(_sorted_distinct)]
    amplitude: Annotated[float, quantity("V", gt=0, le=10, why="an RMS sine of the function generator")]
    aperture: Annotated[float, quantity("s", ge=dmm_driver.AC_APERTURE_S[0], le=dmm_driver.AC_APERTURE_S[1],
                                        why="the DMM's AC aperture")] = 0.1
    range: Annotated[float, quantity("V", gt=0, le=1000, why="an AC range of the DMM")] = 0.1


class AcCmrr(TestKind):
    name = "ac_cmrr"
    title = "CMRR versus frequency"
    spec = AcCmrrSpec
    fixture = "diff_amp"

    def step_fields(self, spec: AcCmrrSpec) -> dict[str, Any]:
        if spec.range not in dmm_driver.RANGES_V:
            refuse(f"range {spec.range:g} V is not an AC range of the DMM",
                   "one of " + ", ".join(f"{r:g} V" for r in dmm_driver.RANGES_V))
        return {"ac": AcSweep(spec.frequencies, spec.amplitude, spec.aperture, spec.range)}

    def lay_out(self, step: TestStep, rows: StepRows, context: KindContext) -> None:
        sweep = _sweep(step)
        for hz in sweep.frequencies_hz:
            rows.raw_point(f"AC output of the difference amplifier at {frequency_label(hz)}", "vac_da",
                           frequency_label(hz), 0.0, hz)
        for hz in sweep.frequencies_hz:
            rows.figure(f"CMRR at {frequency_label(hz)}", "cmrr_ac", frequency_label(hz), 0.0)
        rows.figure("CMRR -3 dB frequency", "cmrr_ac_f3db", None, 0.0)

    def run(self, step: TestStep, tests: StepTests, screen: StepScreen, parts: list[SiteWork]) -> None:
        sweep = _sweep(step)
        amp = screen.bench_config.diff_amp
        if amp is None:
            raise ValueError("the bench has no difference amplifier; the plan should have refused this")
        sites = [p.site for p in parts]
        span = screen.context.span_v
        screen.set_rails(*rails_for(0.0, span))
        screen.set_force(0.0)
        screen.use_fixture(sites, "diff_amp")
        readings: dict[int, list[float]] = {s: [] for s in sites}
        try:
            for hz in sweep.frequencies_hz:
                screen.set_sine(hz, sweep.amplitude_vrms)
                screen.generator_output(True)
                values = screen.read_ac(sites, sweep.range_v, hz, sweep.aperture_s, step.average)
                for site in sites:
                    readings[site].append(values[site])
        finally:
            screen.generator_output(False)
            screen.use_fixture(sites, "servo_loop")
        for part in parts:
            vout = readings[part.site]
            part.raw.extend(zip(tests.raw, vout, strict=True))
            dbs = [cmrr_ac_db(sweep.amplitude_vrms, v, amp.gain) for v in vout]
            f3 = minus_3db_frequency(sweep.frequencies_hz, dbs)
            part.figures.extend(zip(tests.figures, [*dbs, f3], strict=True))

    def check_bench(self, step: TestStep, sequence: TestSequence, bench: BenchConfig) -> None:
        """Frequencies the generator makes and the DMM's AC function reads; a sine within the
        bench limit and the part's input range; a generator on the bench."""
        amp = bench.diff_amp
        if amp is None:
            return   # the plan's fixture check names what is missing
        sweep = _sweep(step)
        key = f"tests[{step.index - 1}]"

        def no(what: str, hint: str) -> ConfigError:
            return ConfigError(sequence.source, what, hint=hint, line=step.line, key=key)

        if not bench.has_generator:
            raise no("the ac_cmrr test needs a function generator (instruments.generator), which the bench lacks",
                     "add the generator to the bench config, or remove the test")
        low_hz, high_hz = max(dmm_driver.AC_FILTERS_HZ[0], gen_driver.FREQUENCY_HZ[0]), min(
            dmm_driver.AC_MAX_HZ, gen_driver.FREQUENCY_HZ[1])
        for hz in sweep.frequencies_hz:
            if not low_hz <= hz <= high_hz:
                raise no(f"frequency point {frequency_label(hz)} is outside what the DMM's AC function reads "
                         f"({frequency_label(low_hz)} to {frequency_label(high_hz)}: its lowest AC filter and "
                         "its AC bandwidth) or the generator makes",
                         f"keep the points within {frequency_label(low_hz)} to {frequency_label(high_hz)}")
        peak = math.sqrt(2.0) * sweep.amplitude_vrms
        limit = min(gen_driver.MAX_VPP / 2.0, bench.max_rail_v)
        if peak > limit + 1e-9:
            raise no(f"amplitude {sweep.amplitude_vrms:g} V RMS peaks at {peak:.3g} V on the tied inputs, beyond "
                     f"{limit:g} V (the generator or the bench's safety limit)", "lower the amplitude")
        part_peak = amp.cm_share * peak
        if part_peak >= sequence.span_v / 2.0:
            raise no(f"amplitude {sweep.amplitude_vrms:g} V RMS swings the part's common mode by +-{part_peak:.3g} V, "
                     f"beyond the rails (+-{sequence.span_v / 2:g} V about mid-supply)", "lower the amplitude")


def _sweep(step: TestStep) -> AcSweep:
    if step.ac is None:
        raise ValueError(f"test {step.index} is not an ac_cmrr step")
    return step.ac


def frequency_limit_problems(table: LimitTable, sequence: TestSequence) -> list[ConfigError]:
    """A cmrr_ac limit at a frequency no ac_cmrr step sweeps, or a -3 dB limit outside the
    sweep (no part could be judged against it), as ConfigErrors at the limit's line."""
    steps = sequence.steps("ac_cmrr")
    if not steps:
        return []
    labels = {frequency_label(hz) for step in steps for hz in _sweep(step).frequencies_hz}
    lowest = min(_sweep(step).frequencies_hz[0] for step in steps)
    highest = max(_sweep(step).frequencies_hz[-1] for step in steps)
    doc = load_yaml_file(table.source)
    problems: list[ConfigError] = []
    for i, grade in enumerate(table.grades):
        for j, limit in enumerate(grade.limits):
            path: list[str | int] = ["grades", i, "limits", j]
            if limit.param == "cmrr_ac" and limit.region not in labels:
                problems.append(doc.error([*path, "region"], f"grade {grade.name} cmrr_ac limit at "
                                          f"{limit.region!r}: the sequence sweeps no such frequency",
                                          "region: one of " + ", ".join(sorted(labels, key=label_frequency))))
            if limit.param == "cmrr_ac_f3db":
                for side in ("low", "high"):
                    value = getattr(limit, side)
                    if value is not None and not lowest < value < highest:
                        problems.append(doc.error([*path, side], f"grade {grade.name} -3 dB frequency limit "
                                                  f"{frequency_label(value)} is outside the sweep "
                                                  f"({frequency_label(lowest)} to {frequency_label(highest)}), "
                                                  "which cannot resolve it",
                                                  "widen the sweep past the limit, or move the limit inside it"))
    return problems


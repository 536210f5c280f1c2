"""Open-loop gain: the offset at several commanded output levels (the force input), at mid
common-mode; AOL from the slope dVos/dVout."""

from __future__ import annotations

from collections.abc import Sequence
from typing import TYPE_CHECKING, Any

from station.config.files import ConfigError
from station.config.rail_points import rails_for
from station.config.step_spec import ForceLevels, StepSpec
from station.config.test_catalog import StepRows
from station.judge.measure import Figure, aol_figures
from station.kinds.base import KindContext, SweepKind
from station.lot.sweep_order import Condition

if TYPE_CHECKING:
    from station.config.sequence import Sequence as TestSequence
    from station.config.sequence import TestStep

FORCE_LEVEL_LIMIT_V = 10.0  # the force source's own range, per docs/bench-commands.md


class GainSpec(StepSpec):
    levels: ForceLevels   # commanded output levels


class OpenLoopGain(SweepKind):
    name = "gain"
    title = "Open-loop gain"
    spec = GainSpec

    def step_fields(self, spec: GainSpec) -> dict[str, Any]:
        return {"levels_v": spec.levels}

    def lay_out(self, step: TestStep, rows: StepRows, context: KindContext) -> None:
        for level in step.levels_v:
            rows.raw_point(f"Vos at Vout {level:+g} V", "vos_force", None, 0.0, level)
        rows.figure("AOL slope dVos/dVout", "aol_slope")
        rows.figure("AOL", "aol")

    def conditions(self, step: TestStep, span_v: float) -> list[Condition]:
        return [(rails_for(0.0, span_v), level) for level in step.levels_v]

    def figures(self, step: TestStep, readings: Sequence[float], context: KindContext) -> list[Figure]:
        return aol_figures(list(step.levels_v), readings)

    def check_safety(self, step: TestStep, sequence: TestSequence) -> None:
        """Every level within the force source's range and inside the output swing."""
        where = sequence.source
        for level in step.levels_v:
            if abs(level) > FORCE_LEVEL_LIMIT_V:
                raise ConfigError(where, f"gain level {level:g} V is beyond the force source's "
                                         f"+-{FORCE_LEVEL_LIMIT_V:g} V", hint="use smaller levels")
            if abs(level) >= sequence.span_v / 2:
                raise ConfigError(where, f"gain level {level:g} V is outside the output swing of a "
                                         f"{sequence.span_v:g} V span", hint="keep levels inside the rails")

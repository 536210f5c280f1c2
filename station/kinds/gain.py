"""Open-loop gain: the offset at several commanded output levels (the force input), at mid
common-mode; AOL from the slope dVos/dVout."""

from __future__ import annotations

from collections.abc import Sequence
from typing import TYPE_CHECKING

from station.config.rail_points import rails_for
from station.config.test_catalog import StepRows
from station.judge.measure import Figure, aol_figures
from station.kinds.base import KindContext, SweepKind
from station.lot.sweep_order import Condition

if TYPE_CHECKING:
    from station.config.sequence import TestStep


class OpenLoopGain(SweepKind):
    name = "gain"
    title = "Open-loop gain"

    def lay_out(self, step: TestStep, rows: StepRows, context: KindContext) -> None:
        for level in step.levels_v:
            rows.raw_point(f"Vos at Vout {level:+g} V", "vos_force", None, 0.0, level)
        rows.figure("AOL slope dVos/dVout", "aol_slope")
        rows.figure("AOL", "aol")

    def conditions(self, step: TestStep, span_v: float) -> list[Condition]:
        return [(rails_for(0.0, span_v), level) for level in step.levels_v]

    def figures(self, step: TestStep, readings: Sequence[float], context: KindContext) -> list[Figure]:
        return aol_figures(list(step.levels_v), readings)

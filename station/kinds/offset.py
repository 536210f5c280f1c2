"""Offset at nominal supply: one loop reading at mid common-mode, logged as the figure `vos`."""

from __future__ import annotations

from collections.abc import Sequence
from typing import TYPE_CHECKING

from station.config.rail_points import rails_for
from station.config.test_catalog import StepRows
from station.judge.measure import Figure
from station.kinds.base import KindContext, SweepKind
from station.lot.sweep_order import Condition

if TYPE_CHECKING:
    from station.config.sequence import TestStep


class OffsetAtNominal(SweepKind):
    name = "offset"
    title = "Offset at nominal"

    def lay_out(self, step: TestStep, rows: StepRows, context: KindContext) -> None:
        rows.figure("Vos at nominal supply", "vos")

    def conditions(self, step: TestStep, span_v: float) -> list[Condition]:
        return [(rails_for(0.0, span_v), 0.0)]

    def figures(self, step: TestStep, readings: Sequence[float], context: KindContext) -> list[Figure]:
        return [Figure("vos", None, readings[0], "V")]

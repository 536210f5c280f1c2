"""Supply rejection: the offset at several supply spans around a constant mid-point; PSRR
from the slope dVos/dVs."""

from __future__ import annotations

from collections.abc import Sequence
from typing import TYPE_CHECKING, Any

from station.config.rail_points import rails_for
from station.config.step_spec import StepSpec, SupplySpans
from station.config.test_catalog import StepRows
from station.judge.measure import Figure, psrr_figures
from station.kinds.base import KindContext, SweepKind
from station.lot.sweep_order import Condition

if TYPE_CHECKING:
    from station.config.sequence import TestStep


class SupplyRejectionSpec(StepSpec):
    spans: SupplySpans    # supply spans around a constant mid-point


class SupplyRejection(SweepKind):
    name = "supply_rejection"
    title = "Supply rejection"
    spec = SupplyRejectionSpec

    def step_fields(self, spec: SupplyRejectionSpec) -> dict[str, Any]:
        return {"spans_v": spec.spans}

    def lay_out(self, step: TestStep, rows: StepRows, context: KindContext) -> None:
        for span in step.spans_v:
            rows.raw_point(f"Vos at span {span:g} V", "vos_span", None, 0.0, span)
        rows.figure("PSRR slope dVos/dVs", "psrr_slope")
        rows.figure("PSRR", "psrr")

    def conditions(self, step: TestStep, span_v: float) -> list[Condition]:
        return [(rails_for(0.0, span), 0.0) for span in step.spans_v]

    def figures(self, step: TestStep, readings: Sequence[float], context: KindContext) -> list[Figure]:
        return psrr_figures(list(step.spans_v), readings)

    def rails(self, step: TestStep, span_v: float) -> list[tuple[str, float, float]]:
        return [(f"supply span {span:g} V", *rails_for(0.0, span)) for span in step.spans_v]

"""Supply current: the quiescent current of each live part at nominal supply, each site
powered alone."""

from __future__ import annotations

from typing import TYPE_CHECKING

from station.config.rail_points import rails_for
from station.config.test_catalog import StepRows, StepTests
from station.kinds.base import KindContext, SiteWork, StepScreen, TestKind, current_wait

if TYPE_CHECKING:
    from station.config.sequence import TestStep


class SupplyCurrent(TestKind):
    name = "supply_current"
    fixture = None   # powers the part and reads the supply, in any fixture
    title = "Supply current"

    def lay_out(self, step: TestStep, rows: StepRows, context: KindContext) -> None:
        rows.figure("Iq at nominal supply", "iq")

    def run(self, step: TestStep, tests: StepTests, screen: StepScreen, parts: list[SiteWork]) -> None:
        screen.set_rails(*rails_for(0.0, screen.context.span_v))
        wait = current_wait(step)
        for part in parts:
            part.figures.append((tests.figures[0], screen.measure_iq(part.site, wait)))
        screen.power_sites({p.site for p in parts})

"""Contact check: each site powered alone, its supply current against the open/short window.

A part outside the window is lifted and re-seated and checked again, up to `retest` times.
Only the parts that made contact are measured further; the others are binned by the window.
"""

from __future__ import annotations

from typing import TYPE_CHECKING, Annotated, Any

from station.config.fields import count
from station.config.step_spec import StepSpec
from station.config.test_catalog import StepRows, StepTests
from station.judge.grading import contact_state
from station.kinds.base import KindContext, SiteWork, StepScreen, TestKind, current_wait

if TYPE_CHECKING:
    from station.config.sequence import TestStep


class ContactSpec(StepSpec):
    retest: Annotated[int, count(0, 3, "re-seats of a part outside the window")] = 1


class ContactCheck(TestKind):
    name = "contact"
    fixture = None   # powers the part and reads the supply, in any fixture
    title = "Contact (Iq window)"
    checks_contact = True
    spec = ContactSpec

    def step_fields(self, spec: ContactSpec) -> dict[str, Any]:
        return {"retest": spec.retest}

    def lay_out(self, step: TestStep, rows: StepRows, context: KindContext) -> None:
        rows.figure("Iq contact check", "contact_iq")

    def run(self, step: TestStep, tests: StepTests, screen: StepScreen, parts: list[SiteWork]) -> None:
        wait = current_wait(step)
        for part in parts:
            iq = screen.measure_iq(part.site, wait)
            part.contact = contact_state(iq, screen.table)
            for _ in range(step.retest):
                if part.contact == "ok":
                    break
                screen.power_sites(set())
                screen.reseat(part.site)
                iq = screen.measure_iq(part.site, wait)
                part.contact = contact_state(iq, screen.table)
            part.figures.append((tests.figures[0], iq))
        screen.power_sites({p.site for p in parts if p.contact == "ok"})

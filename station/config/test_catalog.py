"""Test numbers and names: every row a sequence can log, numbered so lots can be compared.

Test k of the sequence (1-based) numbers its computed figures k*1000 + 1, 2, ... and its raw
points k*1000 + 101, 102, ... The numbers depend only on the sequence and the limit table's
region names, so the same program always logs a figure under the same TEST_NUM.
"""

from __future__ import annotations

from dataclasses import dataclass

from station.config.parameters import FULL_RANGE, PARAMETERS
from station.config.sequence import Sequence, TestStep
from station.judge.measure import region_of

RAW_OFFSET = 101


@dataclass(frozen=True)
class TestDef:
    __test__ = False  # not a pytest test class, despite the name

    test_num: int
    test_txt: str
    param: str
    region: str | None = None
    vcm: float | None = None    # common-mode voltage of the row, V (mid-referenced)
    cond: float | None = None   # swept condition of a raw point (output level or span), V

    @property
    def units(self) -> str:
        return PARAMETERS[self.param].units


_REGION_FIGURES = {"slope": (("cmrr_slope", "CMRR slope"), ("cmrr", "CMRR")),
                   "step": (("cm_step", "Crossover offset step"), ("vos_worst", "Worst |Vos|"))}


def step_tests(step: TestStep, sequence: Sequence, regions: list[tuple[str, str]],
               bounds: dict[str, tuple[float, float]]) -> tuple[list[TestDef], list[TestDef]]:
    """(raw point rows, computed figure rows) that `step` logs, in execution order."""
    base = step.index * 1000
    span = sequence.span_v
    raw: list[TestDef] = []
    computed: list[TestDef] = []

    def figure(param: str, text: str, region: str | None = None, vcm: float | None = 0.0) -> None:
        computed.append(TestDef(base + len(computed) + 1, text, param, region, vcm))

    if step.kind == "contact":
        figure("contact_iq", "Iq contact check")
    elif step.kind == "offset":
        figure("vos", "Vos at nominal supply")
    elif step.kind == "supply_current":
        figure("iq", "Iq at nominal supply")
    elif step.kind == "cm_sweep":
        for i, (point, vcm) in enumerate(zip(step.points, step.point_vcms(span), strict=True)):
            raw.append(TestDef(base + RAW_OFFSET + i, f"Vos at VCM {vcm:+.3f} V ({point})", "vos_cm",
                               region_of(vcm, bounds), vcm))
        for name, kind in regions:
            for param, text in _REGION_FIGURES[kind]:
                figure(param, f"{text} {name} region", name, None)
        figure("cmrr_slope", "CMRR slope full range", FULL_RANGE, None)
        figure("cmrr", "CMRR full range", FULL_RANGE, None)
    elif step.kind == "gain":
        for i, level in enumerate(step.levels_v):
            raw.append(TestDef(base + RAW_OFFSET + i, f"Vos at Vout {level:+g} V", "vos_force", None, 0.0, level))
        figure("aol_slope", "AOL slope dVos/dVout")
        figure("aol", "AOL")
    elif step.kind == "supply_rejection":
        for i, span_v in enumerate(step.spans_v):
            raw.append(TestDef(base + RAW_OFFSET + i, f"Vos at span {span_v:g} V", "vos_span", None, 0.0, span_v))
        figure("psrr_slope", "PSRR slope dVos/dVs")
        figure("psrr", "PSRR")
    return raw, computed


def catalog(sequence: Sequence, regions: list[tuple[str, str]],
            bounds: dict[str, tuple[float, float]]) -> list[TestDef]:
    """Every test the sequence can log, in execution order (raw points before their figures)."""
    tests: list[TestDef] = []
    for step in sequence.tests:
        raw, computed = step_tests(step, sequence, regions, bounds)
        tests.extend(raw + computed)
    return tests

"""Test numbers and names: every row a sequence can log, numbered so lots can be compared.

Test k of the sequence (1-based) numbers its computed figures k*1000 + 1, 2, ... and its raw
points k*1000 + 101, 102, ..., in the order its kind (station/kinds) lays them out. The numbers
depend only on the sequence and the limit table's regions, so the same program always logs a
figure under the same TEST_NUM.
"""

from __future__ import annotations

from dataclasses import dataclass, field

from station.config.parameters import PARAMETERS

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


@dataclass(frozen=True)
class StepTests:
    """The rows one step of the sequence logs: its raw points and its computed figures."""

    __test__ = False

    raw: tuple[TestDef, ...]
    figures: tuple[TestDef, ...]

    @property
    def in_order(self) -> tuple[TestDef, ...]:
        """Raw points before the figures computed from them: the execution order."""
        return self.raw + self.figures


@dataclass
class StepRows:
    """Numbers the rows of step `index` as its kind adds them, in the order added."""

    index: int
    raw: list[TestDef] = field(default_factory=list)
    figures: list[TestDef] = field(default_factory=list)

    def raw_point(self, text: str, param: str, region: str | None = None, vcm: float | None = 0.0,
                  cond: float | None = None) -> None:
        number = self.index * 1000 + RAW_OFFSET + len(self.raw)
        self.raw.append(TestDef(number, text, param, region, vcm, cond))

    def figure(self, text: str, param: str, region: str | None = None, vcm: float | None = 0.0) -> None:
        number = self.index * 1000 + 1 + len(self.figures)
        self.figures.append(TestDef(number, text, param, region, vcm))

    def done(self) -> StepTests:
        return StepTests(tuple(self.raw), tuple(self.figures))

"""Common-mode regions: the one record every stage uses for them.

A limit table names its regions low to high, each with the kind of figure it gives ("slope":
CMRR by least squares; "step": the input-crossover transition) and its ends written against
the rails. The station turns the ends into volts only where it needs numbers, at the span
the sequence runs (`vcm_range`), so one record serves the loader, the test catalog, the
measurement math and the review tools alike.
"""

from __future__ import annotations

from dataclasses import dataclass
from typing import Literal

from station.config.rail_points import RailPoint

RegionKind = Literal["slope", "step"]


@dataclass(frozen=True)
class Region:
    name: str
    kind: RegionKind
    lower: RailPoint
    upper: RailPoint

    def vcm_range(self, span_v: float) -> tuple[float, float]:
        """(low, high) common-mode voltage relative to the supply mid-point at span `span_v`."""
        return self.lower.vcm(span_v), self.upper.vcm(span_v)


def fixed_region(name: str, kind: RegionKind, low_v: float, high_v: float) -> Region:
    """A region between two fixed common-mode voltages (relative to the mid-point), any span."""
    return Region(name, kind, RailPoint("mid", low_v), RailPoint("mid", high_v))

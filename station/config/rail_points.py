"""Common-mode points written relative to the supply rails: "V- - 0.1 V", "V+ - 1.3 V", "mid".

The DUT inputs sit at fixture ground and the station moves both rails around them, so a
common-mode point is naturally said relative to a rail. Internally we use VCM, the input
voltage relative to the supply mid-point: with span S, "V- + x" is -S/2 + x and "V+ + x" is
S/2 + x. For a point VCM, the rails are V+ = S/2 - VCM and V- = -S/2 - VCM.
"""

from __future__ import annotations

import re
from dataclasses import dataclass

from station.config.quantities import parse_quantity

_POINT = re.compile(r"^\s*(V\+|V-|mid)\s*(?:([+-])\s*(.+?))?\s*$", re.IGNORECASE)


@dataclass(frozen=True)
class RailPoint:
    """A common-mode point: `offset_v` volts from `anchor` ("V+", "V-" or "mid")."""

    anchor: str
    offset_v: float

    def vcm(self, span_v: float) -> float:
        """Input voltage relative to the supply mid-point, for supply span `span_v`."""
        base = {"V+": span_v / 2.0, "V-": -span_v / 2.0, "mid": 0.0}[self.anchor]
        return base + self.offset_v

    def __str__(self) -> str:
        if self.offset_v == 0:
            return self.anchor
        sign = "+" if self.offset_v > 0 else "-"
        return f"{self.anchor} {sign} {abs(self.offset_v):g} V"


def parse_rail_point(text: object) -> RailPoint:
    """Parse "V- - 0.1 V", "V+ + 100 mV", "mid", "mid + 1 V". ValueError says how to write it."""
    if not isinstance(text, str):
        raise ValueError(f"expected a point such as 'V- - 0.1 V' or 'V+ - 1.3 V', got {text!r}")
    match = _POINT.match(text)
    if not match:
        raise ValueError(f"cannot read {text!r} as a common-mode point: write it like "
                         "'V- - 0.1 V', 'V+ - 1.3 V' or 'mid + 1 V'")
    anchor = {"v+": "V+", "v-": "V-", "mid": "mid"}[match.group(1).lower()]
    offset = 0.0
    if match.group(2):
        offset = parse_quantity(match.group(3), "V")
        if match.group(2) == "-":
            offset = -offset
    return RailPoint(anchor, offset)


def rails_for(vcm: float, span_v: float) -> tuple[float, float]:
    """(V+, V-) that put grounded inputs at common-mode `vcm` with supply span `span_v`."""
    # Rounded to 1 nV: sources resolve far less, and it keeps 0.1 from printing as 0.09999999999999964.
    return round(span_v / 2.0 - vcm, 9), round(-span_v / 2.0 - vcm, 9)

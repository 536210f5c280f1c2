"""The DC source on the servo loop's force input (it commands the DUT output)."""

from __future__ import annotations

from drivers.errors import attempt_each
from drivers.range_checks import require_within
from drivers.scpi_link import ScpiLink
from drivers.scpi_values import scpi_number
from drivers.switched_output import SwitchedOutput

INSTRUMENT_MAX_V = 10.0   # the force source spans -10 V to +10 V


class ForceSource(SwitchedOutput):
    def __init__(self, link: ScpiLink, max_level_v: float) -> None:
        self.link = link
        self.max_level_v = min(float(max_level_v), INSTRUMENT_MAX_V)

    def set_level(self, volts: float) -> None:
        """Program the level; refused beyond the bench limit or the instrument's range."""
        limit = self.max_level_v
        volts = require_within(self.role, "force level", volts, -limit, limit, "V",
                               f"bench limit {limit:g} V, instrument +-{INSTRUMENT_MAX_V:g} V")
        self.link.write_and_wait(f"VOLT {scpi_number(volts)}")

    def level(self) -> float:
        """Programmed level in V."""
        return self.link.query_float("VOLT?", unit="V")

    def measure(self) -> float:
        return self.link.query_float("MEAS:VOLT?", unit="V")

    def zero_and_off(self) -> None:
        """Level to 0 V and output off; both tried, the first failure raised at the end."""
        attempt_each((lambda: self.set_level(0.0), lambda: self.output(False), self._confirm_off))

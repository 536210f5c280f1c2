"""The DC source on the servo loop's force input (it commands the DUT output)."""

from __future__ import annotations

from drivers.errors import InstrumentError, attempt_each
from drivers.range_checks import require_within
from drivers.scpi_link import ScpiLink
from drivers.scpi_values import scpi_number

INSTRUMENT_MAX_V = 10.0   # the force source spans -10 V to +10 V


class ForceSource:
    def __init__(self, link: ScpiLink, max_level_v: float) -> None:
        self.link = link
        self.max_level_v = min(float(max_level_v), INSTRUMENT_MAX_V)

    @property
    def role(self) -> str:
        return self.link.role

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

    def output(self, on: bool) -> None:
        self.link.write_and_wait(f"OUTP {'ON' if on else 'OFF'}")

    def output_state(self) -> bool:
        return self.link.query_bool("OUTP?")

    def configure(self) -> None:
        """Level 0, output off, error queue checked."""
        self.zero_and_off()
        self.link.check_errors()

    def zero_and_off(self) -> None:
        """Level to 0 V and output off; both tried, the first failure raised at the end."""
        attempt_each((lambda: self.set_level(0.0), lambda: self.output(False), self._confirm_off))

    def _confirm_off(self) -> None:
        # The query proves the writes before it arrived.
        if self.output_state():
            raise InstrumentError(self.role, self.link.resource, "OUTP?",
                                  "still reports the output on after OUTP OFF")

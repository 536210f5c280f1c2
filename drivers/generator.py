"""The function generator on the difference amplifier's tied inputs (AC common mode).

A sine only: FUNCtion SINusoid, FREQuency, VOLTage (RMS, VOLTage:UNIT VRMS), OUTPut. Every
amplitude is checked against the bench's safety limit before it is sent: the sine's peak on
the inputs never exceeds what the rails may see.
"""

from __future__ import annotations

import math

from drivers.errors import attempt_each
from drivers.range_checks import require_within
from drivers.scpi_link import ScpiLink
from drivers.scpi_values import scpi_number
from drivers.switched_output import SwitchedOutput

MAX_VPP = 10.0                       # the instrument's range into a high impedance
FREQUENCY_HZ = (1e-3, 1e6)
SAFE_VRMS = 0.01                     # what the output is left at on the way out


class FunctionGenerator(SwitchedOutput):
    def __init__(self, link: ScpiLink, max_level_v: float) -> None:
        self.link = link
        # The sine's peak, sqrt(2) x RMS, stays within the bench limit and the instrument's.
        self.max_peak_v = min(float(max_level_v), MAX_VPP / 2.0)

    def set_sine(self, frequency_hz: float, amplitude_vrms: float) -> None:
        """A sine of `amplitude_vrms` at `frequency_hz`, in one message; refused beyond the
        instrument's frequency range or the bench limit on its peak."""
        frequency_hz = require_within(self.role, "frequency", frequency_hz, *FREQUENCY_HZ, "Hz", "instrument range")
        limit = self.max_peak_v / math.sqrt(2.0)
        amplitude_vrms = require_within(self.role, "amplitude", amplitude_vrms, 0.0, limit, "V RMS",
                                        f"peak within {self.max_peak_v:g} V (bench limit and instrument)")
        self.link.write_and_wait(f"FUNC SIN;:VOLT:UNIT VRMS;:FREQ {scpi_number(frequency_hz)};"
                                 f":VOLT {scpi_number(amplitude_vrms)};:VOLT:OFFS 0")

    def frequency(self) -> float:
        return self.link.query_float("FREQ?", unit="HZ")

    def amplitude_vrms(self) -> float:
        self.link.write_and_wait("VOLT:UNIT VRMS")
        return self.link.query_float("VOLT?", unit="V")

    def zero_and_off(self) -> None:
        """Output off and the amplitude down; both tried, the first failure raised at the end."""
        attempt_each((lambda: self.output(False), lambda: self.set_sine(1e3, SAFE_VRMS), self._confirm_off))

"""The two-channel rail supply: channel 1 is V+, channel 2 is V-.

Every setting is checked against the instrument's range and the bench's safety limits before
it is sent; both rails always move in one compound message so they change together.
"""

from __future__ import annotations

import time
from typing import Literal

from drivers.errors import InstrumentError, RequestRefused, attempt_each
from drivers.range_checks import require_within
from drivers.scpi_link import ScpiLink
from drivers.scpi_values import scpi_number

Rail = Literal["V+", "V-"]

INSTRUMENT_MAX_V = 15.0        # bipolar channels, -15 V to +15 V
INSTRUMENT_MIN_A = 100e-6      # compliance range of the instrument
INSTRUMENT_MAX_A = 100e-3
_CHANNEL = {"V+": 1, "V-": 2}


class DualRailSupply:
    def __init__(self, link: ScpiLink, max_rail_v: float, compliance_a: float) -> None:
        self.link = link
        self.max_rail_v = min(float(max_rail_v), INSTRUMENT_MAX_V)
        self.compliance_a = float(compliance_a)
        # What the station last sent (not what a read-back said): the ramp-down starts here,
        # because a read-back taken while the link is out of step may answer another query.
        # Unknown (None) until the first setting goes out.
        self.commanded: tuple[float, float] | None = None

    @property
    def role(self) -> str:
        return self.link.role

    def configure(self, compliance_a: float | None = None) -> None:
        """Set the compliance (default: the bench's safety compliance) and check the error queue."""
        self.set_compliance(self.compliance_a if compliance_a is None else compliance_a)
        self.link.check_errors()

    def set_compliance(self, amps: float) -> None:
        """Current compliance of both rails; refused above the bench's safety compliance."""
        high = min(self.compliance_a, INSTRUMENT_MAX_A)
        amps = require_within(self.role, "current compliance", amps, INSTRUMENT_MIN_A, high, "A",
                              "bench safety compliance and instrument range")
        value = scpi_number(amps)
        self.link.write_and_wait(f"INST:NSEL 1;:CURR {value};:INST:NSEL 2;:CURR {value}")

    def set_rails(self, v_pos: float, v_neg: float) -> None:
        """Program V+ and V- together; refused beyond max_rail, the instrument, or V+ < V-."""
        limit = self.max_rail_v
        reason = f"bench safety limit max_rail {self.max_rail_v:g} V, instrument +-{INSTRUMENT_MAX_V:g} V"
        v_pos = require_within(self.role, "V+", v_pos, -limit, limit, "V", reason)
        v_neg = require_within(self.role, "V-", v_neg, -limit, limit, "V", reason)
        if v_pos < v_neg:
            raise RequestRefused(self.role, "rails", f"V+ {v_pos:g} V, V- {v_neg:g} V",
                                 "V+ >= V-", "the rails would be reversed")
        # Recorded before sending: a setting that may have arrived counts as commanded.
        self.commanded = (v_pos, v_neg)
        self.link.write_and_wait(f"INST:NSEL 1;:VOLT {scpi_number(v_pos)};"
                                 f":INST:NSEL 2;:VOLT {scpi_number(v_neg)}")

    def rails(self) -> tuple[float, float]:
        """Programmed (V+, V-)."""
        return (self.link.query_float("INST:NSEL 1;:VOLT?"),
                self.link.query_float("INST:NSEL 2;:VOLT?"))

    def outputs(self, on: bool) -> None:
        state = "ON" if on else "OFF"
        self.link.write_and_wait(f"INST:NSEL 1;:OUTP {state};:INST:NSEL 2;:OUTP {state}")

    def outputs_state(self) -> tuple[bool, bool]:
        return (self.link.query_bool("INST:NSEL 1;:OUTP?"),
                self.link.query_bool("INST:NSEL 2;:OUTP?"))

    def measure_current(self, rail: Rail) -> float:
        """Output current in A (V+ sources, positive; V- sinks, negative)."""
        return self.link.query_float(f"INST:NSEL {_channel(self.role, rail)};:MEAS:CURR?")

    def measure_voltage(self, rail: Rail) -> float:
        return self.link.query_float(f"INST:NSEL {_channel(self.role, rail)};:MEAS:VOLT?")

    def ramp_down_and_off(self, steps: int = 5, step_delay_s: float = 0.02) -> None:
        """Bring both rails to 0 V in `steps` steps, then turn both outputs off, then verify.

        The steps start from the levels the station last commanded, never from a read-back,
        and only ever move towards zero. Every command is absolute, so sending it twice is
        harmless. Every step is tried even if an earlier one fails (a lost reply must not
        leave the rails up); the first failure is raised at the end.
        """
        failures: list[InstrumentError] = []
        start = self.commanded or (0.0, 0.0)   # unknown levels: go straight to zero
        for v_pos, v_neg in ramp_towards_zero(start, steps):
            try:
                self.set_rails(v_pos, v_neg)
            except RequestRefused:
                pass                    # levels set outside our limits: skip to the next step
            except InstrumentError as exc:
                failures.append(exc)
                break                   # a failing link: go to the absolute zero at once
            time.sleep(step_delay_s)
        attempt_each((lambda: self.set_rails(0.0, 0.0), lambda: self.outputs(False), self.verify_off),
                     failures)

    def verify_state(self, v_pos: float, v_neg: float, on: bool) -> None:
        """Read back that the supply is as the station set it (levels and outputs).

        Done at lot start and after every recovery: a setting lost in a fault, or a command
        an earlier, stopped run left queued, must not go unnoticed into a measurement."""
        levels, outputs = self.rails(), self.outputs_state()
        if any(abs(got - want) > 1e-3 for got, want in zip(levels, (v_pos, v_neg), strict=True)) \
                or outputs != (on, on):
            state = "on" if on else "off"
            raise InstrumentError(self.role, self.link.resource, "VOLT?;OUTP?",
                                  f"reads back V+ {levels[0]:g} V, V- {levels[1]:g} V, outputs "
                                  f"{outputs}, where the station set {v_pos:g} V / {v_neg:g} V, {state}")

    def verify_off(self) -> None:
        """Read back that both outputs are off and programmed to 0 V (on a resynchronised link)."""
        if any(self.outputs_state()):
            raise InstrumentError(self.role, self.link.resource, "OUTP?",
                                  "still reports an output on after OUTP OFF")
        levels = self.rails()
        if any(abs(level) > 1e-3 for level in levels):
            raise InstrumentError(self.role, self.link.resource, "VOLT?",
                                  f"reads back V+ {levels[0]:g} V, V- {levels[1]:g} V after VOLT 0")


def ramp_towards_zero(start: tuple[float, float], steps: int) -> list[tuple[float, float]]:
    """Intermediate (V+, V-) levels from `start` to zero, each closer to zero than the last.

    Zero itself is not in the list: the caller sends it as its own absolute command."""
    count = max(1, steps)
    return [(start[0] * (1.0 - k / count), start[1] * (1.0 - k / count)) for k in range(1, count)]


def _channel(role: str, rail: str) -> int:
    if rail not in _CHANNEL:
        raise RequestRefused(role, "rail", rail, "'V+' or 'V-'")
    return _CHANNEL[rail]

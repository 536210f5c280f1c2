"""The two-channel rail supply: channel 1 is V+, channel 2 is V-.

Every setting is checked against the instrument's range and the bench's safety limits before
it is sent; both rails always move in one compound message so they change together.
"""

from __future__ import annotations

import time
from typing import Literal

from drivers.errors import InstrumentBadReply, InstrumentError, RequestRefused, attempt_each
from drivers.range_checks import require_within
from drivers.scpi_link import ScpiLink
from drivers.scpi_values import parse_scpi_float, scpi_number

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
        self.link.write_and_wait(self._compliance_command(amps))

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
        self.link.write_and_wait(self._levels_command(v_pos, v_neg))

    def rails(self) -> tuple[float, float]:
        """Programmed (V+, V-)."""
        return self._programmed_level(1), self._programmed_level(2)

    def outputs(self, on: bool) -> None:
        self.link.write_and_wait(self._outputs_command(on))

    def outputs_state(self) -> tuple[bool, bool]:
        return (self.link.query_bool(self._output_query(1)),
                self.link.query_bool(self._output_query(2)))

    def measure_current(self, rail: Rail) -> float:
        """Output current in A (V+ sources, positive; V- sinks, negative)."""
        return self.link.query_float(self._measure_query("CURR", _channel(self.role, rail)), unit="A")

    def measure_voltage(self, rail: Rail) -> float:
        return self.link.query_float(self._measure_query("VOLT", _channel(self.role, rail)), unit="V")

    # -- the command set: what a driver for another supply overrides ------------------------
    # Everything above (range and safety checks, both rails in one message, the ramp-down and
    # the read-backs) is common to every two-channel supply; only the command text differs.
    # This one selects the channel with INSTrument:NSELect, then programs it.

    def _compliance_command(self, amps: float) -> str:
        value = scpi_number(amps)
        return f"INST:NSEL 1;:CURR {value};:INST:NSEL 2;:CURR {value}"

    def _levels_command(self, v_pos: float, v_neg: float) -> str:
        return f"INST:NSEL 1;:VOLT {scpi_number(v_pos)};:INST:NSEL 2;:VOLT {scpi_number(v_neg)}"

    def _outputs_command(self, on: bool) -> str:
        state = "ON" if on else "OFF"
        return f"INST:NSEL 1;:OUTP {state};:INST:NSEL 2;:OUTP {state}"

    def _programmed_level(self, channel: int) -> float:
        return self.link.query_float(f"INST:NSEL {channel};:VOLT?", unit="V")

    def _output_query(self, channel: int) -> str:
        return f"INST:NSEL {channel};:OUTP?"

    def _measure_query(self, quantity: str, channel: int) -> str:
        return f"INST:NSEL {channel};:MEAS:{quantity}?"


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


class ApplySupply(DualRailSupply):
    """A two-channel supply programmed with APPLy and a channel parameter on every command
    (``APPL CH1,5,0.01``, ``OUTP ON,CH1``, ``MEAS:CURR? CH2``), for supplies without
    INSTrument:NSELect. APPLy sets a channel's level and current limit together, so each
    setting sends both: the levels the station last commanded (0 V before the first) with the
    compliance it last set."""

    def __init__(self, link: ScpiLink, max_rail_v: float, compliance_a: float) -> None:
        super().__init__(link, max_rail_v, compliance_a)
        self._limit_a = min(self.compliance_a, INSTRUMENT_MAX_A)

    def _compliance_command(self, amps: float) -> str:
        self._limit_a = amps
        v_pos, v_neg = self.commanded or (0.0, 0.0)
        return self._levels_command(v_pos, v_neg)

    def _levels_command(self, v_pos: float, v_neg: float) -> str:
        amps = scpi_number(self._limit_a)
        return f"APPL CH1,{scpi_number(v_pos)},{amps};:APPL CH2,{scpi_number(v_neg)},{amps}"

    def _outputs_command(self, on: bool) -> str:
        state = "ON" if on else "OFF"
        return f"OUTP {state},CH1;:OUTP {state},CH2"

    def _programmed_level(self, channel: int) -> float:
        command = f"APPL? CH{channel}"

        def level(reply: str) -> float:
            # '"<volts>,<amps>"' (a quoted string on most supplies, bare on some)
            parts = reply.strip().strip('"').split(",")
            try:
                return parse_scpi_float(parts[0], "V")
            except (ValueError, IndexError):
                raise InstrumentBadReply(self.role, self.link.resource, command,
                                         f"returned {reply!r}, not '\"volts,amps\"'") from None

        return level(self.link.query(command))

    def _output_query(self, channel: int) -> str:
        return f"OUTP? CH{channel}"

    def _measure_query(self, quantity: str, channel: int) -> str:
        return f"MEAS:{quantity}? CH{channel}"

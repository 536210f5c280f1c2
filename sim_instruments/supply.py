"""Simulated two-channel rail supply (channel 1 = V+, channel 2 = V-)."""

from __future__ import annotations

import numpy as np

from sim_instruments.instrument import Instrument
from sim_instruments.model import DEFAULT_COMPLIANCE_A, SLEW_V_PER_S, BenchModel
from sim_instruments.scpi_params import Arguments, boolean, choice, integer, number
from sim_instruments.scpi_tree import CommandTree

VOLTAGE_LIMIT_V = 15.0
COMPLIANCE_RANGE_A = (100e-6, 100e-3)
CURRENT_NOISE_A = 0.1e-6   # MEAS:CURR? read-back noise
VOLTAGE_NOISE_V = 20e-6    # MEAS:VOLT? read-back noise


class Supply(Instrument):
    model_name = "ASP-2215"

    def __init__(self, model: BenchModel, seed: int, **kwargs) -> None:
        self.model = model
        self.selected = 1
        self._rng = np.random.default_rng([seed, 501])
        super().__init__(**kwargs)

    def reset(self) -> None:
        self.selected = 1
        with self.model.lock:
            for channel in (1, 2):
                self.model.set_supply(channel, self.clock.now(), voltage=0.0, output=False,
                                      compliance=DEFAULT_COMPLIANCE_A)

    def build(self, tree: CommandTree) -> None:
        volts = Arguments([number("V", -VOLTAGE_LIMIT_V, VOLTAGE_LIMIT_V, {"DEF": 0.0})])
        amps = Arguments([number("A", *COMPLIANCE_RANGE_A, {"DEF": DEFAULT_COMPLIANCE_A})])
        tree.add("INSTrument:NSELect", self._select, lambda: str(self.selected),
                 args=Arguments([integer(1, 2)]))
        tree.add("INSTrument[:SELect]", self._select_name, lambda: f"CH{self.selected}",
                 args=Arguments([choice("CH1", "CH2")]))
        tree.add("[SOURce:]VOLTage[:LEVel][:IMMediate][:AMPLitude]", self._set_voltage,
                 lambda: self.dialect.number(self._channel().programmed_v, "V"), args=volts)
        tree.add("[SOURce:]CURRent[:LEVel][:IMMediate][:AMPLitude]", self._set_current,
                 lambda: self.dialect.number(self._channel().compliance_a, "A"), args=amps)
        tree.add("[SOURce:]VOLTage:SLEW", query=lambda: self.dialect.number(SLEW_V_PER_S))
        # A channel after the parameters (OUTP ON,CH2; MEAS:CURR? CH1) acts on that channel
        # and leaves the selection alone: the command set of supplies programmed with APPLy.
        channel = choice("CH1", "CH2")
        tree.add("OUTPut[:STATe]", self._set_output,
                 self._output_query,
                 args=Arguments([boolean], [channel]), query_args=Arguments([], [channel]))
        tree.add("MEASure[:SCALar]:VOLTage[:DC]", query=self._measure_voltage,
                 query_args=Arguments([], [channel]))
        tree.add("MEASure[:SCALar]:CURRent[:DC]", query=self._measure_current,
                 query_args=Arguments([], [channel]))
        tree.add("APPLy", self._apply, self._apply_query,
                 args=Arguments([channel, volts.required[0]], [amps.required[0]]),
                 query_args=Arguments([channel]))

    def _channel(self, name: str | None = None):
        return self.model.channels[self._number(name) - 1]

    def _number(self, name: str | None) -> int:
        return self.selected if name is None else int(name[-1])

    def _select(self, channel: int) -> None:
        self.selected = channel

    def _select_name(self, name: str) -> None:
        self.selected = int(name[-1])

    def _set_voltage(self, volts: float) -> None:
        with self.model.lock:
            self.model.set_supply(self.selected, self.clock.now(), voltage=volts)

    def _set_current(self, amps: float) -> None:
        with self.model.lock:
            self.model.set_supply(self.selected, self.clock.now(), compliance=amps)

    def _set_output(self, on: bool, name: str | None = None) -> None:
        if not on and self.faults.output_stuck_on:
            return
        with self.model.lock:
            self.model.set_supply(self._number(name), self.clock.now(), output=on)

    def _output_query(self, name: str | None = None) -> str:
        return self.dialect.flag(self._channel(name).output)

    def _apply(self, name: str, volts: float, amps: float | None = None) -> None:
        with self.model.lock:
            self.model.set_supply(self._number(name), self.clock.now(), voltage=volts, compliance=amps)

    def _apply_query(self, name: str) -> str:
        channel = self._channel(name)
        # A quoted string of level and limit, without units, as APPLy? answers on such supplies.
        return f'"{self.dialect.number(channel.programmed_v)},{self.dialect.number(channel.compliance_a)}"'

    def _measure_voltage(self, name: str | None = None) -> str:
        number = self._number(name)
        with self.model.lock:
            value = self.model.supply_voltage(number, self.clock.now())
            on = self.model.channels[number - 1].output or value != 0.0
        noise = self._rng.normal(0.0, VOLTAGE_NOISE_V) if on else 0.0
        return self.dialect.number(value + noise + self.faults.readback_v, "V")

    def _measure_current(self, name: str | None = None) -> str:
        number = self._number(name)
        with self.model.lock:
            value = self.model.supply_current(number)
            on = self.model.channels[number - 1].output
        noise = self._rng.normal(0.0, CURRENT_NOISE_A) if on else 0.0
        return self.dialect.number(value + noise, "A")

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
        tree.add("OUTPut[:STATe]", self._set_output,
                 lambda: self.dialect.flag(self._channel().output), args=Arguments([boolean]))
        tree.add("MEASure[:SCALar]:VOLTage[:DC]", query=self._measure_voltage)
        tree.add("MEASure[:SCALar]:CURRent[:DC]", query=self._measure_current)

    def _channel(self):
        return self.model.channels[self.selected - 1]

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

    def _set_output(self, on: bool) -> None:
        with self.model.lock:
            self.model.set_supply(self.selected, self.clock.now(), output=on)

    def _measure_voltage(self) -> str:
        with self.model.lock:
            value = self.model.supply_voltage(self.selected, self.clock.now())
            on = self._channel().output or value != 0.0
        noise = self._rng.normal(0.0, VOLTAGE_NOISE_V) if on else 0.0
        return self.dialect.number(value + noise, "V")

    def _measure_current(self) -> str:
        with self.model.lock:
            value = self.model.supply_current(self.selected)
            on = self._channel().output
        noise = self._rng.normal(0.0, CURRENT_NOISE_A) if on else 0.0
        return self.dialect.number(value + noise, "A")

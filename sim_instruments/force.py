"""Simulated force source on the servo loop's force input (the commanded DUT output)."""

from __future__ import annotations

import numpy as np

from sim_instruments.instrument import Instrument
from sim_instruments.model import BenchModel
from sim_instruments.scpi_params import Arguments, boolean, number
from sim_instruments.scpi_tree import CommandTree

FORCE_LIMIT_V = 10.0
READBACK_NOISE_V = 10e-6


class ForceSource(Instrument):
    model_name = "ASF-110"

    def __init__(self, model: BenchModel, seed: int, **kwargs) -> None:
        self.model = model
        self._rng = np.random.default_rng([seed, 502])
        super().__init__(**kwargs)

    def reset(self) -> None:
        with self.model.lock:
            self.model.set_force(self.clock.now(), level=0.0, output=False)

    def build(self, tree: CommandTree) -> None:
        tree.add("[SOURce:]VOLTage[:LEVel][:IMMediate][:AMPLitude]", self._set_level,
                 lambda: self.dialect.number(self.model.force_level_v, "V"),
                 args=Arguments([number("V", -FORCE_LIMIT_V, FORCE_LIMIT_V, {"DEF": 0.0})]))
        tree.add("OUTPut[:STATe]", self._set_output,
                 lambda: self.dialect.flag(self.model.force_output), args=Arguments([boolean]))
        tree.add("MEASure[:SCALar]:VOLTage[:DC]", query=self._measure)

    def _set_level(self, volts: float) -> None:
        with self.model.lock:
            self.model.set_force(self.clock.now(), level=volts)

    def _set_output(self, on: bool) -> None:
        if not on and self.faults.output_stuck_on:
            return
        with self.model.lock:
            self.model.set_force(self.clock.now(), output=on)

    def _measure(self) -> str:
        with self.model.lock:
            value = self.model.force_voltage()
            on = self.model.force_output
        return self.dialect.number(value + (self._rng.normal(0.0, READBACK_NOISE_V) if on else 0.0), "V")

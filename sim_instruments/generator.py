"""Simulated function generator: a sine (FUNCtion SINusoid only), its frequency, amplitude
(VPP or VRMS) and output relay. Its output is summed onto the tied inputs of the difference
amplifier, so it reaches a meter only through the fixture's model (model.ac_node_vrms)."""

from __future__ import annotations

import math

from sim_instruments.instrument import Instrument
from sim_instruments.model import BenchModel
from sim_instruments.scpi_errors import ScpiError
from sim_instruments.scpi_params import Arguments, boolean, choice, number
from sim_instruments.scpi_tree import CommandTree

MAX_FREQUENCY_HZ = 1e6       # invented instrument: 1 mHz to 1 MHz, up to 10 Vpp into high impedance
MIN_FREQUENCY_HZ = 1e-3
MAX_VPP = 10.0
SINE_CREST = 2.0 * math.sqrt(2.0)   # Vpp / Vrms of a sine


class FunctionGenerator(Instrument):
    model_name = "ASG-20"

    def __init__(self, model: BenchModel, **kwargs) -> None:
        self.model = model
        super().__init__(**kwargs)

    def reset(self) -> None:
        self.unit = "VPP"
        with self.model.lock:
            self.model.set_generator(self.clock.now(), frequency=1e3, vrms=0.1 / SINE_CREST, output=False)

    def build(self, tree: CommandTree) -> None:
        tree.add("[SOURce:]FUNCtion[:SHAPe]", self._set_function, lambda: "SIN",
                 args=Arguments([choice("SINusoid")]))
        tree.add("[SOURce:]FREQuency[:CW]", self._set_frequency,
                 lambda: self.dialect.number(self.model.generator.frequency_hz, "HZ"),
                 args=Arguments([number("HZ", MIN_FREQUENCY_HZ, MAX_FREQUENCY_HZ, {"DEF": 1e3})]))
        tree.add("[SOURce:]VOLTage[:LEVel][:IMMediate][:AMPLitude]", self._set_amplitude, self._amplitude,
                 args=Arguments([number("V", 0.0, MAX_VPP, {"DEF": 0.1})]))
        tree.add("[SOURce:]VOLTage:UNIT", self._set_unit, lambda: self.unit, args=Arguments([choice("VPP", "VRMS")]))
        tree.add("[SOURce:]VOLTage:OFFSet", self._set_offset, lambda: self.dialect.number(0.0, "V"),
                 args=Arguments([number("V", -MAX_VPP, MAX_VPP, {"DEF": 0.0})]))
        tree.add("OUTPut[:STATe]", self._set_output, lambda: self.dialect.flag(self.model.generator.output),
                 args=Arguments([boolean]))

    def _set_function(self, shape: str) -> None:
        return None   # a sine is all this generator makes

    def _set_frequency(self, hz: float) -> None:
        with self.model.lock:
            self.model.set_generator(self.clock.now(), frequency=hz)

    def _set_unit(self, unit: str) -> None:
        self.unit = unit

    def _set_offset(self, volts: float) -> None:
        if volts != 0.0:
            raise ScpiError(-221, "the DC level on the tied inputs is the force source's: offset 0 only")

    def _set_amplitude(self, value: float) -> None:
        vrms = value / SINE_CREST if self.unit == "VPP" else value
        if vrms * SINE_CREST > MAX_VPP * (1 + 1e-9):
            raise ScpiError(-222, f"amplitude beyond {MAX_VPP:g} Vpp")
        with self.model.lock:
            self.model.set_generator(self.clock.now(), vrms=vrms)

    def _amplitude(self) -> str:
        vrms = self.model.generator.amplitude_vrms
        return self.dialect.number(vrms * SINE_CREST if self.unit == "VPP" else vrms, "V")

    def _set_output(self, on: bool) -> None:
        if not on and self.faults.output_stuck_on:
            return
        with self.model.lock:
            self.model.set_generator(self.clock.now(), output=on)

"""Simulated DC voltmeter on a loop measurement node.

A reading integrates the node over NPLC / LFRequency seconds of model time and really takes
that long (divided by the bench speed); autozero ON adds a zero phase of the same length.
The instrument lock is held while it waits, the model lock is not, so several DMMs can
integrate at the same time. Noise is drawn from a generator seeded per DMM.
"""

from __future__ import annotations

import math
import struct
from dataclasses import dataclass

import numpy as np

from sim_instruments.instrument import Instrument
from sim_instruments.model import BenchModel, dmm_own_noise
from sim_instruments.scpi_errors import ScpiError
from sim_instruments.scpi_params import Arguments, boolean, choice, first_of, integer, number
from sim_instruments.scpi_tree import CommandTree

RANGES_V = (0.1, 1.0, 10.0, 100.0, 1000.0)
OVERRANGE = 1.2          # readings beyond 1.2 x range are overload
OVERLOAD_V = 9.9e37      # SCPI's overload value
NPLC_RANGE = (0.02, 100.0)
# The reading buffer: 131072 readings are 1 MiB as REAL,64 (IEEE 754 doubles, big-endian).
BUFFER_READINGS = 131072
OPEN_INPUT_V = 0.0       # an open input (no scanner relay closed) reads about zero


def range_for(value: float) -> float:
    """Smallest range that holds |value| (the largest range if none does)."""
    for candidate in RANGES_V:
        if abs(value) <= candidate * (1 + 1e-9):
            return candidate
    return RANGES_V[-1]


@dataclass
class Acquisition:
    """Readings started by INITiate (or READ?), computed once their windows are over."""

    t0: float
    count: int
    integration_s: float
    cycle_s: float
    site: int | None
    range_v: float
    autorange: bool
    autozero: bool
    nplc: float
    readings: list[float] | None = None   # +inf: overload

    @property
    def end(self) -> float:
        return self.t0 + self.count * self.cycle_s


class Dmm(Instrument):
    model_name = "ASM-65"

    def __init__(self, model: BenchModel, index: int, seed: int, line_hz: float, **kwargs) -> None:
        self.model = model
        self.index = index
        self.line_hz_default = line_hz
        self.line_hz = line_hz
        self._rng = np.random.default_rng([seed, 600 + index])
        self._acquisition: Acquisition | None = None
        super().__init__(**kwargs)

    def reset(self) -> None:
        self.range_v = 10.0
        self.autorange = False
        self.nplc = 1.0
        self.samples = 1
        self.autozero = True
        self.real_format = False   # FORMat:DATA ASCii (text) or REAL (binary block)
        self._acquisition = None

    @property
    def ideal(self) -> bool:
        """Ideal bench: readings are instant (no integration wait), noise is kept."""
        return self.model.ideal

    def wait_pending(self) -> None:
        if self._acquisition is not None and not self.ideal:
            self.clock.sleep_until(self._acquisition.end)

    def build(self, tree: CommandTree) -> None:
        range_arg = number("V", 0.0, RANGES_V[-1], {"MIN": RANGES_V[0], "DEF": 10.0})
        conf_range = first_of(choice("AUTO"), range_arg)
        tree.add("CONFigure[:VOLTage][:DC]", self._configure, args=Arguments([], [conf_range]))
        tree.add("[SENSe:]VOLTage[:DC]:NPLCycles", self._set_nplc,
                 lambda: self.dialect.number(self.nplc),
                 args=Arguments([number("", *NPLC_RANGE, {"DEF": 1.0})]))
        tree.add("[SENSe:]VOLTage[:DC]:RANGe[:UPPer]", self._set_range,
                 lambda: self.dialect.number(self.range_v), args=Arguments([range_arg]))
        tree.add("[SENSe:]VOLTage[:DC]:RANGe:AUTO", self._set_autorange,
                 lambda: self.dialect.flag(self.autorange), args=Arguments([boolean]))
        tree.add("[SENSe:]ZERO:AUTO", self._set_autozero, lambda: self.dialect.flag(self.autozero),
                 args=Arguments([first_of(boolean, choice("ONCE"))]))
        tree.add("SAMPle:COUNt", self._set_samples, lambda: str(self.samples),
                 args=Arguments([integer(1, BUFFER_READINGS, {"DEF": 1})]))
        tree.add("FORMat[:DATA]", self._set_format, lambda: "REAL,64" if self.real_format else "ASC,0",
                 args=Arguments([choice("ASCii", "REAL")], [integer(0, 64)]))
        tree.add("SYSTem:LFRequency", self._set_line, lambda: str(int(self.line_hz)),
                 args=Arguments([number("HZ", 50.0, 60.0)]))
        tree.add("READ", query=self._read)
        tree.add("INITiate[:IMMediate]", self._initiate)
        tree.add("FETCh", query=self._fetch_query)
        tree.add("MEASure[:VOLTage][:DC]", query=self._measure, query_args=Arguments([], [conf_range]))

    # --- settings ------------------------------------------------------------------------
    def _apply_range(self, value: object) -> None:
        if value == "AUTO":
            self.autorange = True
        elif value is not None:
            self.autorange = False
            self.range_v = range_for(float(value))  # type: ignore[arg-type]

    def _configure(self, value: object = None) -> None:
        self._apply_range(value)

    def _set_nplc(self, value: float) -> None:
        self.nplc = value

    def _set_range(self, value: float) -> None:
        self._apply_range(value)

    def _set_autorange(self, on: bool) -> None:
        self.autorange = on

    def _set_autozero(self, value: object) -> None:
        if value == "ONCE":
            if not self.ideal:
                self.clock.sleep(self.nplc / self.line_hz)  # one zero measurement, then off
            self.autozero = False
        else:
            self.autozero = bool(value)

    def _set_samples(self, count: int) -> None:
        self.samples = count

    def _set_format(self, kind: str, length: int | None = None) -> None:
        if kind == "REAL" and length not in (None, 64):
            raise ScpiError(-224, "REAL data is 64 bits")
        self.real_format = kind == "REAL"

    def _set_line(self, hz: float) -> None:
        if hz not in (50.0, 60.0):
            raise ScpiError(-222, "line frequency is 50 or 60 Hz")
        self.line_hz = hz

    # --- readings ------------------------------------------------------------------------
    def _initiate(self) -> None:
        integration = self.nplc / self.line_hz
        with self.model.lock:
            now = self.clock.now()
            site = self.model.dmm_site(self.index)
        self._acquisition = Acquisition(
            t0=now, count=self.samples, integration_s=integration,
            cycle_s=integration * (2.0 if self.autozero else 1.0), site=site,
            range_v=self.range_v, autorange=self.autorange, autozero=self.autozero,
            nplc=self.nplc)

    def _fetch_query(self) -> str:
        if self._acquisition is None:
            raise ScpiError(-230, "no readings: send INITiate first")
        return self._fetch(self._acquisition)

    def _read(self) -> str:
        self._initiate()
        assert self._acquisition is not None
        return self._fetch(self._acquisition)

    def _measure(self, value: object = None) -> str:
        self._apply_range("AUTO" if value is None else value)
        self.samples = 1
        return self._read()

    def _fetch(self, acq: Acquisition) -> str:
        if acq.readings is None:
            if not self.ideal:
                self.clock.sleep_until(acq.end)  # the model lock is free while we integrate
            acq.readings = [self._reading(acq, i) for i in range(acq.count)]
        if not self.real_format:
            return ",".join(self.dialect.number(v, "V") if math.isfinite(v) else self.dialect.overload("V")
                            for v in acq.readings)
        # IEEE 488.2 definite-length block: #, the digit count, the byte count, the bytes
        # (carried one byte per character; the server sends them as latin-1).
        data = struct.pack(f">{len(acq.readings)}d",
                           *(v if math.isfinite(v) else OVERLOAD_V for v in acq.readings))
        count = str(len(data))
        return f"#{len(count)}{count}" + data.decode("latin-1")

    def _reading(self, acq: Acquisition, i: int) -> float:
        start = acq.t0 + i * acq.cycle_s
        with self.model.lock:
            if self.model.dmm_shorted(self.index):
                mean, part_sigma = 0.0, 0.0
            elif acq.site is None:
                mean, part_sigma = OPEN_INPUT_V, 0.0
            else:
                mean = self.model.node_mean(acq.site, start, start + acq.integration_s)
                part_sigma = self.model.node_noise(acq.site, acq.integration_s)
        range_v = range_for(mean) if acq.autorange else acq.range_v
        sigma = math.hypot(part_sigma, dmm_own_noise(range_v, acq.nplc, acq.autozero))
        gain = 1.0 + self.model.errors.dmm_gain_error[self.index - 1]  # the bench's own error
        value = gain * (mean + float(self._rng.normal(0.0, sigma))) + self.faults.offset_v
        if abs(value) > OVERRANGE * range_v:
            return math.inf
        return value

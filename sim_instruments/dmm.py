"""Simulated voltmeter on a loop measurement node: DC, and AC at the generator's frequency.

A DC reading integrates the node over NPLC / LFRequency seconds of model time and really takes
that long (divided by the bench speed); autozero ON adds a zero phase of the same length.
The instrument lock is held while it waits, the model lock is not, so several DMMs can
integrate at the same time. Noise is drawn from a generator seeded per DMM.

AC (CONFigure:VOLTage:AC): a narrow-band, synchronous reading of the node's component at the
function generator's frequency, over an aperture (VOLTage:AC:APERture) after the AC filter
has settled (VOLTage:AC:BANDwidth picks the filter: the lower its corner, the longer it takes;
the meter waits for it after every trigger). Its noise is the node's white noise over that
aperture, in phase and in quadrature, so a reading is the magnitude of signal plus noise. A
broadband true-RMS reading would add all the node's noise up to the meter's bandwidth (about
1.5 uV/rtHz x 300 Hz^0.5 = 0.5 mV at the demo's gain of 100): such a meter could not see a
part's CMRR at all; this one models what a lock-in style reading can.
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
# The AC function (invented meter): filters with these corners (the lowest frequency they
# pass), each settling in AC_SETTLE_PERIODS of its corner; the input's own -3 dB bandwidth;
# its own noise density per volt of range; the generator's amplitude jitter seen per reading.
AC_FILTERS_HZ = (3.0, 20.0, 200.0)
AC_SETTLE_PERIODS = 25.0
AC_INPUT_BANDWIDTH_HZ = 300e3
AC_NOISE_PER_RANGE_RTHZ = 1e-7
AC_APERTURE_S = (1e-3, 10.0)
GENERATOR_JITTER = 1e-4


def ac_filter_for(lowest_hz: float) -> float:
    """The fastest filter whose corner is at or below `lowest_hz` (the slowest if none is)."""
    fitting = [f for f in AC_FILTERS_HZ if f <= lowest_hz * (1 + 1e-9)]
    return max(fitting) if fitting else AC_FILTERS_HZ[0]


def ac_settle_s(filter_hz: float) -> float:
    return AC_SETTLE_PERIODS / filter_hz


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
    ac: bool = False

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
        self.function = "DC"
        self.ac_filter_hz = 20.0
        self.ac_aperture_s = 0.1

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
        tree.add("CONFigure[:VOLTage]:AC", self._configure_ac, args=Arguments([], [conf_range]))
        tree.add("[SENSe:]VOLTage:AC:RANGe[:UPPer]", self._set_range,
                 lambda: self.dialect.number(self.range_v), args=Arguments([range_arg]))
        tree.add("[SENSe:]VOLTage:AC:BANDwidth", self._set_filter, lambda: self.dialect.number(self.ac_filter_hz),
                 args=Arguments([number("HZ", AC_FILTERS_HZ[0], AC_INPUT_BANDWIDTH_HZ, {"DEF": 20.0})]))
        tree.add("[SENSe:]VOLTage:AC:APERture", self._set_aperture, lambda: self.dialect.number(self.ac_aperture_s),
                 args=Arguments([number("S", *AC_APERTURE_S, {"DEF": 0.1})]))
        tree.add("[SENSe:]FUNCtion", query=lambda: f'"VOLT:{self.function}"')
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
        self.function = "DC"
        self._apply_range(value)

    def _configure_ac(self, value: object = None) -> None:
        self.function = "AC"
        self._apply_range(value)

    def _set_filter(self, lowest_hz: float) -> None:
        self.ac_filter_hz = ac_filter_for(lowest_hz)

    def _set_aperture(self, seconds: float) -> None:
        self.ac_aperture_s = seconds

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
        if self.function == "AC":   # the filter settles first (the meter's own trigger delay)
            self._acquisition = Acquisition(
                t0=now + ac_settle_s(self.ac_filter_hz), count=self.samples, integration_s=self.ac_aperture_s,
                cycle_s=self.ac_aperture_s, site=site, range_v=self.range_v, autorange=self.autorange,
                autozero=False, nplc=self.nplc, ac=True)
            return
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

    def _ac_reading(self, acq: Acquisition) -> float:
        with self.model.lock:
            if self.model.dmm_shorted(self.index) or acq.site is None:
                signal, part_sigma = 0.0, 0.0
            else:
                signal = self.model.ac_node_vrms(acq.site)
                part_sigma = self.model.node_noise(acq.site, acq.integration_s)
            frequency = self.model.generator.frequency_hz
        range_v = range_for(signal) if acq.autorange else acq.range_v
        signal *= (1.0 + float(self._rng.normal(0.0, GENERATOR_JITTER))) / math.hypot(1.0, frequency / AC_INPUT_BANDWIDTH_HZ)
        own = AC_NOISE_PER_RANGE_RTHZ * range_v / math.sqrt(2.0 * acq.integration_s)
        sigma = math.hypot(part_sigma, own)
        in_phase, quadrature = self._rng.normal(0.0, sigma, 2)
        gain = 1.0 + self.model.errors.dmm_gain_error[self.index - 1]
        value = gain * math.hypot(signal + float(in_phase), float(quadrature))
        return math.inf if value > OVERRANGE * range_v else value

    def _reading(self, acq: Acquisition, i: int) -> float:
        if acq.ac:
            return self._ac_reading(acq)
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

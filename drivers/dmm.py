"""A voltmeter on a site's loop measurement node: DC, and AC (configure_ac).

Reads can take long (100 NPLC at 50 Hz is 2 s per sample, doubled by autozero), so every
query that waits for readings extends its timeout by the expected integration time.
`LoopDmm.read_together` (or `start()` then `fetch()`) lets several DMMs integrate at the same time.
"""

from __future__ import annotations

import math
import time
from collections.abc import Callable, Sequence

from drivers.errors import InstrumentBadReply, InstrumentError, RequestRefused
from drivers.range_checks import require_within
from drivers.retry import RETRYABLE
from drivers.scpi_link import ScpiLink, query_together
from drivers.scpi_values import scpi_number

RANGES_V = (0.1, 1.0, 10.0, 100.0, 1000.0)
NPLC_MIN, NPLC_MAX = 0.02, 100.0
SAMPLES_MAX = 1000
# The AC function (the meter's documented behaviour): its filters pass from their corner up,
# each settling in AC_SETTLE_PERIODS of its corner after a trigger; readings up to AC_MAX_HZ.
AC_FILTERS_HZ = (3.0, 20.0, 200.0)
AC_SETTLE_PERIODS = 25.0
AC_MAX_HZ = 100e3
AC_APERTURE_S = (1e-3, 10.0)


def ac_filter_for(lowest_hz: float) -> float:
    """The fastest AC filter that passes `lowest_hz`."""
    fitting = [f for f in AC_FILTERS_HZ if f <= lowest_hz * (1 + 1e-9)]
    return max(fitting) if fitting else AC_FILTERS_HZ[0]


def ac_settle_s(lowest_hz: float) -> float:
    """How long the meter's AC filter for `lowest_hz` settles after each trigger."""
    return AC_SETTLE_PERIODS / ac_filter_for(lowest_hz)


class LoopDmm:
    def __init__(self, link: ScpiLink, line_hz: float) -> None:
        if line_hz not in (50.0, 60.0):
            raise RequestRefused(link.role, "line frequency", line_hz, "50 Hz or 60 Hz")
        self.link = link
        self.line_hz = float(line_hz)
        # The *RST defaults, until configure() says otherwise.
        self.nplc = 1.0
        self.range_v: float | None = 10.0
        self.autozero = True
        self.samples = 1
        self.function = "DC"
        self.ac_lowest_hz = 20.0
        self.ac_aperture_s = 0.1

    @property
    def role(self) -> str:
        return self.link.role

    def configure(self, nplc: float, range_v: float | None, autozero: bool, samples: int = 1) -> None:
        """DC volts with the given integration, range (None = autorange), autozero and sample count."""
        nplc = require_within(self.role, "NPLC", nplc, NPLC_MIN, NPLC_MAX, "", "instrument range")
        if range_v is not None and float(range_v) not in RANGES_V:
            raise RequestRefused(self.role, "range", f"{range_v} V",
                                 ", ".join(f"{r:g}" for r in RANGES_V) + " V or autorange")
        if isinstance(samples, bool) or not isinstance(samples, int) or not 1 <= samples <= SAMPLES_MAX:
            raise RequestRefused(self.role, "sample count", samples, f"1 to {SAMPLES_MAX}")
        range_part = (f":CONF:VOLT:DC {scpi_number(range_v)}" if range_v is not None
                      else ":CONF:VOLT:DC;:VOLT:DC:RANG:AUTO ON")
        # One message with its *OPC?: a failure re-sends the whole configuration.
        self.link.write_and_check(f"SYST:LFR {int(self.line_hz)};{range_part};"
                                  f":VOLT:DC:NPLC {scpi_number(nplc)};"
                                  f":ZERO:AUTO {'ON' if autozero else 'OFF'};:SAMP:COUN {samples}")
        self.nplc, self.range_v, self.autozero, self.samples = nplc, range_v, autozero, samples
        self.function = "DC"

    def configure_ac(self, range_v: float, lowest_hz: float, aperture_s: float, samples: int = 1) -> None:
        """AC volts (RMS at the generator's frequency): range, the lowest frequency to pass (it
        picks the filter, and so the settling), the aperture of each reading, the sample count."""
        if float(range_v) not in RANGES_V:
            raise RequestRefused(self.role, "AC range", f"{range_v} V", ", ".join(f"{r:g}" for r in RANGES_V) + " V")
        lowest_hz = require_within(self.role, "lowest AC frequency", lowest_hz, AC_FILTERS_HZ[0], AC_MAX_HZ, "Hz",
                                   "the AC function's band")
        aperture_s = require_within(self.role, "AC aperture", aperture_s, *AC_APERTURE_S, "s", "instrument range")
        if isinstance(samples, bool) or not isinstance(samples, int) or not 1 <= samples <= SAMPLES_MAX:
            raise RequestRefused(self.role, "sample count", samples, f"1 to {SAMPLES_MAX}")
        self.link.write_and_check(f":CONF:VOLT:AC {scpi_number(range_v)};:VOLT:AC:BAND {scpi_number(lowest_hz)};"
                                  f":VOLT:AC:APER {scpi_number(aperture_s)};:SAMP:COUN {samples}")
        self.function, self.range_v, self.samples = "AC", float(range_v), samples
        self.ac_lowest_hz, self.ac_aperture_s = lowest_hz, aperture_s

    @property
    def integration_time_s(self) -> float:
        """Expected time of one trigger: all samples, each NPLC / line frequency, x2 with autozero
        (AC: the filter's settling, then each sample's aperture)."""
        if self.function == "AC":
            return ac_settle_s(self.ac_lowest_hz) + self.ac_aperture_s * self.samples
        per_sample = self.nplc / self.line_hz * (2.0 if self.autozero else 1.0)
        return per_sample * self.samples

    def read(self) -> float:
        """Trigger and read; the mean of the samples, +-inf on overload (9.9E37)."""
        return _mean(self.read_samples())

    def read_samples(self) -> list[float]:
        return self.link.query_floats("READ?", timeout_s=self._wait_s(), unit="V")

    def read_count(self, samples: int) -> list[float]:
        """Trigger `samples` samples and read them; a new count is set in the same message
        (`SAMP:COUN n;:READ?`, one round trip) and stays for later reads."""
        command, wait = self.read_query(samples)
        values = self.link.query_floats(command, timeout_s=wait, unit="V")
        self.samples = samples
        return values

    def read_query(self, samples: int) -> tuple[str, float]:
        """The query that triggers and reads `samples` samples (setting the count only when it
        changes), and its timeout: the link's plus the integration of those samples."""
        if isinstance(samples, bool) or not isinstance(samples, int) or not 1 <= samples <= SAMPLES_MAX:
            raise RequestRefused(self.role, "sample count", samples, f"1 to {SAMPLES_MAX}")
        if samples == self.samples:
            return "READ?", self._wait_s()
        per_sample = self.integration_time_s / self.samples
        return f"SAMP:COUN {samples};:READ?", self.link.timeout_s + per_sample * samples

    @staticmethod
    def read_together(dmms: Sequence[LoopDmm], samples: Sequence[int],
                      clock: Callable[[], float] = time.monotonic) -> list[tuple[float, list[float]]]:
        """`samples[i]` samples from each DMM (each on its own link), all triggered before any
        is read (drivers.scpi_link.query_together), so they integrate at the same time; per
        DMM, (clock time its query was sent, its samples). A DMM whose query failed is asked
        again alone under its link's retry policy, the failed try counting as the first."""
        queries = [dmm.read_query(count) for dmm, count in zip(dmms, samples, strict=True)]
        replies = query_together([(dmm.link, command, wait)
                                  for dmm, (command, wait) in zip(dmms, queries, strict=True)], clock)
        for dmm, count in zip(dmms, samples, strict=True):
            dmm.samples = count     # the count went out with each query (a failure reconfigures)
        return [(sent, _samples_of(dmm.link, command, wait, reply))
                for dmm, (command, wait), (sent, reply) in zip(dmms, queries, replies, strict=True)]

    def start(self) -> None:
        """INIT: start integrating now; collect with fetch()."""
        self.link.write("INIT")

    def fetch(self) -> list[float]:
        """The readings of the last start(), waiting for the integration to finish.

        If the fetch fails (timeout, garbage, dropped link), the readings are taken again with
        READ? at the same condition rather than fetched again: after a reconnect, the INIT may
        not have been received, and a FETCh? would return the readings of an earlier one.
        """
        try:
            return self.link.query_floats("FETC?", timeout_s=self._wait_s(), retry=False, unit="V")
        except RETRYABLE:
            self.link.retries += 1
            return self.read_samples()

    def _wait_s(self) -> float:
        return self.link.timeout_s + self.integration_time_s


def _samples_of(link: ScpiLink, command: str, wait: float, reply: str | InstrumentError) -> list[float]:
    """The readings of a pipelined reply; a failed one goes through the link's retry policy,
    its failure replayed as the policy's first try."""
    failed: list[InstrumentError] = []
    if isinstance(reply, InstrumentError):
        failed.append(reply)
    else:
        try:
            return link.parse_floats(command, reply, "V")
        except InstrumentBadReply as exc:
            failed.append(exc)

    def attempt() -> list[float]:
        if failed:
            raise failed.pop()
        return link.query_floats(command, timeout_s=wait, retry=False, unit="V")

    return link.with_retry(attempt)


def _mean(values: list[float]) -> float:
    overloads = [v for v in values if math.isinf(v)]
    if overloads:
        return overloads[0]     # an overloaded sample makes the whole reading an overload
    return sum(values) / len(values)

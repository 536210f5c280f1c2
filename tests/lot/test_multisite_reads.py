"""SiteReader against fake DMMs: adaptive settling on each site, concurrency, the scanner.

The fake loop node approaches its value as c + a exp(-t / tau) with Gaussian noise; time is a
fake clock advanced by each reading's integration, so nothing here depends on wall time
except the overlap test, which checks the order of events, not durations.
"""

from __future__ import annotations

import math
import threading

import numpy as np
import pytest

from station.config.sequence import Settle, TestStep
from station.lot.site_readings import NOISE_SAMPLES, SiteReader

GAIN = 1001.0


class FakeClock:
    def __init__(self) -> None:
        self.t = 0.0
        self.lock = threading.Lock()

    def __call__(self) -> float:
        return self.t

    def sleep(self, seconds: float) -> None:
        with self.lock:
            self.t += max(0.0, seconds)


class FakeDmm:
    """A node settling to `final` (node volts) from `final + step` with time constant `tau`."""

    def __init__(self, clock: FakeClock, final: float, step: float, tau: float, sigma: float, seed: int,
                 advance: bool = True) -> None:
        self.clock, self.final, self.step, self.tau, self.sigma = clock, final, step, tau, sigma
        self.rng = np.random.default_rng(seed)
        self.samples, self.nplc, self.advance = 1, 1.0, advance
        self.configured: list[tuple[float, int]] = []
        self.started = 0.0

    @property
    def integration_time_s(self) -> float:
        return self.nplc / 50.0 * self.samples

    def configure(self, nplc: float, range_v: float | None, autozero: bool, samples: int = 1) -> None:
        self.nplc, self.samples = nplc, samples
        self.configured.append((nplc, samples))

    def restart(self) -> None:
        self.started = self.clock()

    @staticmethod
    def read_together(dmms, samples, clock) -> list:
        """Every DMM integrates over the same window (as LoopDmm.read_together's do): each
        reads from the same start, and the clock ends where the longest one ends."""
        start, end, out = clock.t, clock.t, []
        for dmm, count in zip(dmms, samples, strict=True):
            clock.t = start
            dmm.samples = count
            out.append((start, dmm.read_samples()))
            end = max(end, clock.t)
        clock.t = end
        return out

    def read_samples(self) -> list[float]:
        values = []
        for _ in range(self.samples):
            t = self.clock() - self.started
            values.append(self.final + self.step * math.exp(-t / self.tau) + self.rng.normal(0.0, self.sigma))
            if self.advance:
                self.clock.sleep(self.nplc / 50.0)
        return values


def _step(average: int = 1, nplc: float = 1.0) -> TestStep:
    return TestStep(index=1, kind="offset", name="t", nplc=nplc, average=average,
                    settle=Settle(sigmas=2.0, tail_s=0.04, max_s=0.3), stop_on_fail=False)


def _reader(dmms, clock, per_site=True, switch=None) -> SiteReader:
    return SiteReader(dmms=dmms, switch=switch, loop_gain=GAIN, dmm_per_site=per_site, dmm_range_v=10.0,
                      autozero=False, sleep=clock.sleep, clock=clock)


def test_auto_settling_measures_the_noise_then_stops_once_the_residual_is_below_it():
    clock = FakeClock()
    sigma_node = 75e-9 * GAIN
    dmm = FakeDmm(clock, final=20e-6 * GAIN, step=2e-6 * GAIN, tau=0.03, sigma=sigma_node, seed=1)
    reader = _reader([dmm], clock)
    step = _step()
    # First condition: the tolerance is unknown, so the station measures the noise itself.
    reader.read([1], step)
    assert reader.stats.noise_checks == 1 and (1.0, NOISE_SAMPLES) in dmm.configured
    assert reader.noise_rti[1.0] == pytest.approx(75e-9, rel=0.4)
    # Later conditions: a fresh 2 uV approach (27 sigma); reading stops well before the bound,
    # with the value within a few sigma of the settled one.
    errors, durations = [], []
    for seed in range(20):
        dmm.rng = np.random.default_rng(100 + seed)
        dmm.restart()
        before = clock()
        value = reader.read([1], step)[1]
        durations.append(clock() - before)
        errors.append(value - 20e-6)
    assert reader.stats.noise_checks == 1           # measured once per NPLC
    assert max(durations) < 0.3                      # never ran into the bound
    # The approach needs ln(2 uV / 75 nV) * 30 ms = 98 ms to fall below the noise (arithmetic of
    # the exponential approach).
    assert 0.06 < float(np.median(durations)) < 0.2
    assert float(np.sqrt(np.mean(np.square(errors)))) < 3 * 75e-9


def test_auto_settling_is_bounded_by_max():
    clock = FakeClock()
    dmm = FakeDmm(clock, final=0.0, step=1e-3 * GAIN, tau=10.0, sigma=1e-9, seed=2)  # never settles
    reader = _reader([dmm], clock)
    reader.noise_rti[1.0] = 1e-9
    dmm.restart()
    start = clock()
    reader.read([1], _step())
    assert reader.stats.timeouts == 1
    assert 0.3 <= clock() - start < 0.3 + 0.05


def test_an_overloaded_site_does_not_hold_the_others_up():
    clock = FakeClock()
    good = FakeDmm(clock, final=1e-3, step=0.0, tau=0.01, sigma=1e-6, seed=3)
    over = FakeDmm(clock, final=math.inf, step=0.0, tau=0.01, sigma=0.0, seed=4, advance=False)
    reader = _reader([good, over], clock)
    reader.noise_rti[1.0] = 1e-6 / GAIN
    values = reader.read([1, 2], _step())
    assert math.isinf(values[2]) and values[1] == pytest.approx(1e-3 / GAIN, rel=0.01)
    assert reader.stats.timeouts == 0


def test_one_dmm_per_site_reads_all_sites_in_one_window():
    clock = FakeClock()
    dmms = [FakeDmm(clock, final=1e-3 * k, step=0.0, tau=0.01, sigma=1e-7, seed=k) for k in range(1, 5)]
    reader = _reader(dmms, clock)
    fixed = TestStep(index=1, kind="offset", name="t", nplc=1.0, average=2, settle=Settle(wait_s=0.0),
                     stop_on_fail=False)
    values = reader.read([1, 2, 3, 4], fixed)
    assert values == {k: pytest.approx(1e-3 * k / GAIN, rel=1e-3) for k in range(1, 5)}
    # Four sites of two 1-NPLC samples took the time of one site's integration (40 ms).
    assert clock() == pytest.approx(0.04)


class RecordingSwitch:
    def __init__(self, dmm: FakeDmm, finals: dict[int, float]) -> None:
        self.dmm, self.finals, self.routes = dmm, finals, []

    def route_to_dmm(self, site: int) -> None:
        self.routes.append(site)
        self.dmm.final = self.finals[site]


def test_one_dmm_behind_the_scanner_reads_the_sites_in_turn():
    clock = FakeClock()
    dmm = FakeDmm(clock, final=0.0, step=0.0, tau=0.01, sigma=1e-7, seed=5)
    finals = {1: 1e-3, 2: 2e-3, 3: 3e-3}
    switch = RecordingSwitch(dmm, finals)
    reader = _reader([dmm], clock, per_site=False, switch=switch)
    reader.noise_rti[1.0] = 1e-7 / GAIN
    values = reader.read([1, 2, 3], _step())
    assert values == {s: pytest.approx(v / GAIN, rel=1e-3) for s, v in finals.items()}
    # Each site is routed, settled and read before the next one is routed.
    assert switch.routes == sorted(switch.routes) and set(switch.routes) == {1, 2, 3}

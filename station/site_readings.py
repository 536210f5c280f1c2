"""Loop readings of every live site at one bench condition, after settling.

The sequencer changes a source, then asks for the offsets of the live sites here. With one
DMM per site, all DMMs integrate at once (INIT on each, then FETCh? on each); with a single
DMM behind the scanner, the sites are read one after another. Settling is either a fixed
wait or adaptive: read until two successive readings agree within a tolerance referred to
the input, bounded by a minimum and a maximum time.
"""

from __future__ import annotations

import math
import time
from collections.abc import Callable
from dataclasses import dataclass, field

from station.sequence import Settle, TestStep


@dataclass
class ReadingStats:
    """What the settling cost, for progress and benchmarks."""

    conditions: int = 0
    readings: int = 0
    settle_s: float = 0.0
    timeouts: int = 0  # conditions where adaptive settling hit its maximum


@dataclass
class SiteReader:
    dmms: list            # LoopDmm drivers (one per site, or one with the scanner)
    switch: object        # FixtureSwitch, for the scanner
    loop_gain: float
    dmm_per_site: bool
    dmm_range_v: float
    autozero: bool
    sleep: Callable[[float], None] = time.sleep
    clock: Callable[[], float] = time.monotonic
    stats: ReadingStats = field(default_factory=ReadingStats)
    _config: tuple | None = None

    def configure(self, nplc: float, samples: int) -> None:
        """Configure every DMM for this integration time, only when it changes (saves round trips)."""
        wanted = (nplc, samples)
        if self._config == wanted:
            return
        for dmm in self.dmms:
            dmm.configure(nplc=nplc, range_v=self.dmm_range_v, autozero=self.autozero, samples=samples)
        self._config = wanted

    def _read_once(self, sites: list[int]) -> dict[int, list[float]]:
        """One reading group (SAMPle:COUNt samples) per site, in volts at the loop node."""
        if self.dmm_per_site:
            for site in sites:
                self.dmms[site - 1].start()
            return {site: self.dmms[site - 1].fetch() for site in sites}
        values = {}
        for site in sites:
            self.switch.route_to_dmm(site)
            values[site] = self.dmms[0].read_samples()
        return values

    def read(self, sites: list[int], step: TestStep, settle: Settle | None = None) -> dict[int, float]:
        """Settle, then return the offset (V, referred to the input) of each site; inf = over-range."""
        if not sites:
            return {}
        settle = settle or step.settle
        self.configure(step.nplc, step.average)
        self.stats.conditions += 1
        start = self.clock()
        if not settle.adaptive:
            self.sleep(settle.wait_s or 0.0)
            groups = self._read_once(sites)
            self.stats.readings += 1
        else:
            groups = self._settle_adaptive(sites, settle, start)
        self.stats.settle_s += self.clock() - start
        return {site: _mean(values) / self.loop_gain for site, values in groups.items()}

    def _settle_adaptive(self, sites: list[int], settle: Settle, start: float) -> dict[int, list[float]]:
        if settle.min_s > 0:
            self.sleep(settle.min_s)
        tolerance = settle.stable_rti_v * self.loop_gain
        previous = self._read_once(sites)
        self.stats.readings += 1
        while True:
            current = self._read_once(sites)
            self.stats.readings += 1
            if all(_agree(previous[s][-1], current[s][-1], tolerance) for s in sites):
                return current
            if self.clock() - start >= settle.max_s:
                self.stats.timeouts += 1
                return current
            previous = current


def _agree(a: float, b: float, tolerance: float) -> bool:
    # An overloaded site cannot settle; it must not hold the other sites up.
    if math.isinf(a) or math.isinf(b):
        return True
    return abs(a - b) <= tolerance


def _mean(values: list[float]) -> float:
    if any(math.isinf(v) for v in values):
        return math.inf
    return math.fsum(values) / len(values)

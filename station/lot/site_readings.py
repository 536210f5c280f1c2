"""Loop readings of every live site at one bench condition, after settling.

The sequencer changes a source, then asks for the offsets of the live sites here. With one
DMM per site, the DMMs integrate at the same time: a READ? goes to every DMM before any reply
is read (drivers/dmm.LoopDmm.read_together), so the integrations overlap with no thread per DMM. With a
single DMM behind the scanner, the sites are read one after another (while one is read,
the others go on settling).

Settling (see station/config/sequence.Settle): a fixed wait, or adaptive. Adaptive settling reads
reading groups back to back from the source change on (the DMM integrates while the loop
settles, so waiting costs no extra time) and stops, site by site, when a group is stable:
- absolute: it agrees with the group before within `stable_within` (RTI volts);
- auto: the residual an exponential approach predicts for it is below `sigmas` times its
  noise, the noise measured by the station itself on the first condition that needs it.
Every adaptive condition is bounded by `max`.
"""

from __future__ import annotations

import math
import time
from collections.abc import Callable
from dataclasses import dataclass, field

from drivers.dmm import LoopDmm
from drivers.switch import FixtureSwitch
from station.config.sequence import Settle, TestStep
from station.judge.measure import vos_from_loop
from station.lot.settle_rule import (
    PREDICT_Z,
    group_tolerance,
    johnson_rms,
    mean,
    noise_from_samples,
    predicted_residual,
    predicted_wait,
    step_bound,
    typical_noise,
    window_envelope,
)

NOISE_SAMPLES = 16  # back-to-back samples per site that measure the noise at an NPLC


@dataclass
class ReadingStats:
    """What the settling cost, for progress and benchmarks."""

    conditions: int = 0
    readings: int = 0          # reading groups taken (all sites of a group count once)
    settle_s: float = 0.0
    timeouts: int = 0          # conditions where adaptive settling hit its maximum
    noise_checks: int = 0      # noise measurements (one per NPLC per lot)


@dataclass
class _Track:
    """One site's reading groups at the current condition: (start time, mean) of each."""

    groups: list[tuple[float, float]] = field(default_factory=list)
    done: bool = False

    @property
    def value(self) -> float:
        return self.groups[-1][1] if self.groups else math.nan


@dataclass
class SiteReader:
    dmms: list[LoopDmm]           # one per site, or one with the scanner
    switch: FixtureSwitch | None  # routes the one DMM to a site (needed only with the scanner)
    loop_gain: float
    dmm_per_site: bool
    dmm_range_v: float
    autozero: bool
    sleep: Callable[[float], None] = time.sleep
    clock: Callable[[], float] = time.monotonic
    stats: ReadingStats = field(default_factory=ReadingStats)
    noise_rti: dict[float, float] = field(default_factory=dict)  # NPLC -> RMS of one sample, V RTI
    _config: tuple[float, int] | None = None

    def configure(self, nplc: float, samples: int) -> None:
        """Configure every DMM for this integration time, only when it changes (saves round trips)."""
        wanted = (nplc, samples)
        if self._config == wanted:
            return
        for dmm in self.dmms:
            dmm.configure(nplc=nplc, range_v=self.dmm_range_v, autozero=self.autozero, samples=samples)
        self._config = wanted

    def forget_config(self) -> None:
        """The DMMs may have lost their settings (after a fault): configure them again next time."""
        self._config = None

    def _group_time_s(self) -> float:
        return self.dmms[0].integration_time_s

    # --- reading groups ---
    def _group(self, sites: list[int]) -> dict[int, list[float]]:
        """One reading group (SAMPle:COUNt samples) per site, in volts at the loop node."""
        if not self.dmm_per_site:
            if self.switch is None:
                raise ValueError("one DMM for several sites needs the fixture switch to route it")
            values = {}
            for site in sites:
                self.switch.route_to_dmm(site)
                values[site] = self.dmms[0].read_samples()
            return values
        dmms = [self.dmms[site - 1] for site in sites]
        read = dmms[0].read_together(dmms, [dmm.samples for dmm in dmms], self.clock)
        return {site: values for site, (_, values) in zip(sites, read, strict=True)}

    def _group_of(self, sites: list[int], count: int) -> dict[int, tuple[float, list[float]]]:
        """`count` samples per site (the count set with the trigger), with the time each
        site's query was sent; per-site DMMs read at once, one DMM site after site."""
        if self.dmm_per_site:
            dmms = [self.dmms[site - 1] for site in sites]
            read = dmms[0].read_together(dmms, [count] * len(sites), self.clock)
            values = dict(zip(sites, read, strict=True))
        else:
            assert self.switch is not None
            values = {}
            for site in sites:
                self.switch.route_to_dmm(site)
                values[site] = (self.clock(), self.dmms[0].read_count(count))
        if self._config is not None:
            self._config = (self._config[0], count)
        return values

    def read_ac(self, sites: list[int], range_v: float, frequency_hz: float, aperture_s: float,
                samples: int) -> dict[int, float]:
        """AC amplitude (V RMS at the node) per site: every DMM set to AC for `frequency_hz`
        (its filter), then one group of `samples`; the next DC reading configures DC again."""
        self._config = None
        for dmm in self.dmms:
            dmm.configure_ac(range_v, frequency_hz, aperture_s, samples)
        self.stats.conditions += 1
        start = self.clock()
        values = {site: _ac_mean(v) for site, v in self._group(sites).items()}
        self.stats.readings += 1
        self.stats.settle_s += self.clock() - start
        return values

    # --- one condition ---
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
            node = {site: mean(v) for site, v in self._group(sites).items()}
            self.stats.readings += 1
        else:
            tolerance = self._tolerance_node_v(sites, step, settle, start)
            begin = self.clock()  # after a noise measurement, the condition is settled anew
            if self.dmm_per_site:
                node = self._settle(sites, settle, tolerance, begin)
            else:  # one DMM: each site in turn, the later ones settling meanwhile
                node = {}
                for site in sites:
                    node.update(self._settle([site], settle, tolerance, begin))
        self.stats.settle_s += self.clock() - start
        return {site: vos_from_loop(value, self.loop_gain) for site, value in node.items()}

    def read_after_relay(self, sites: list[int], step: TestStep, before: dict[int, float],
                         rb_in: dict[int, float], changed_at: float) -> dict[int, float]:
        """The offset (V RTI) of each site after a relay moved at `changed_at` (clock time of
        its acknowledgement) from a settled state whose offsets were `before`, the wait
        predicted from one early sample and the approach's known shape (`step.predict`,
        station/lot/settle_rule). `rb_in`: the resistance now in series with each site's
        inputs, whose Johnson noise is a lower bound of what the readings add."""
        shape = step.predict
        if shape is None:
            raise ValueError(f"step {step.name!r} has no predict: shape; use read()")
        if not sites:
            return {}
        self.configure(step.nplc, step.average)
        self.stats.conditions += 1
        start = self.clock()
        origin = changed_at + shape.delay_s
        window = step.nplc / self.dmms[0].line_hz
        shunted = self.noise_rti.get(step.nplc, 0.0)   # measured with Rb shunted, if yet
        ready: dict[int, float] = {}     # clock time each site's reading may start
        offsets: dict[int, float] = {}   # one DMM: each site read as soon as it may be
        probes = self._group_of(sites, 1) if self.dmm_per_site else {}
        for site in sites:
            sample = math.hypot(shunted, johnson_rms(rb_in[site], window))
            tolerance = shape.sigmas * sample / math.sqrt(step.average)
            if not self.dmm_per_site:   # one DMM: each site probed in turn, the others settling
                probes.update(self._group_of([site], 1))
            sent, values = probes[site]
            probe = vos_from_loop(mean(values), self.loop_gain)
            a = sent - origin
            share = window_envelope(a, a + window, shape.tau_s, shape.tail_s, shape.tail_share)
            slack = PREDICT_Z * (sample + math.hypot(shunted, sample) / math.sqrt(step.average)) + tolerance
            bound = step_bound(probe, before[site], share, slack)
            wait = predicted_wait(bound, tolerance, shape.tau_s, shape.tail_s, shape.tail_share)
            if wait > shape.max_s:
                self.stats.timeouts += 1
                wait = shape.max_s
            ready[site] = origin + wait
            if not self.dmm_per_site:
                self.sleep(max(0.0, ready[site] - self.clock()))
                offsets[site] = vos_from_loop(mean(self._group_of([site], step.average)[site][1]), self.loop_gain)
        self.stats.readings += 2
        if not self.dmm_per_site:
            self.stats.settle_s += self.clock() - start
            return offsets
        self.sleep(max(0.0, max(ready.values()) - self.clock()))
        found = self._group_of(sites, step.average)
        self.stats.settle_s += self.clock() - start
        return {site: vos_from_loop(mean(values), self.loop_gain) for site, (_, values) in found.items()}

    def _tolerance_node_v(self, sites: list[int], step: TestStep, settle: Settle, start: float) -> float:
        if not settle.auto:
            return (settle.stable_rti_v or 0.0) * self.loop_gain
        sigma = self.noise_rti.get(step.nplc)
        if sigma is None:
            sigma = self._measure_noise(sites, step, settle, start)
        assert settle.sigmas is not None
        return group_tolerance(settle.sigmas, sigma, step.average) * self.loop_gain

    def _measure_noise(self, sites: list[int], step: TestStep, settle: Settle, start: float) -> float:
        """Noise of one sample at this NPLC, from back-to-back samples at a settled condition.

        The first time an NPLC is needed the tolerance is unknown, so the condition waits its
        maximum, then every site takes NOISE_SAMPLES samples; the median over sites counts.
        """
        self.sleep(max(0.0, settle.max_s - (self.clock() - start)))
        self.configure(step.nplc, NOISE_SAMPLES)
        groups = self._group(sites if self.dmm_per_site else sites[:1])
        self.configure(step.nplc, step.average)
        self.stats.noise_checks += 1
        sigma = typical_noise(noise_from_samples(v) for v in groups.values())
        if sigma is None:  # no site could be read (all overloaded): no tolerance to learn yet
            return math.inf
        self.noise_rti[step.nplc] = sigma / self.loop_gain
        return self.noise_rti[step.nplc]

    def _settle(self, sites: list[int], settle: Settle, tolerance: float, start: float) -> dict[int, float]:
        """Read groups back to back until every site's group is stable; site by site, the
        first stable group is its value. Bounded by `settle.max_s` from `start`."""
        if settle.min_s > 0:
            self.sleep(max(0.0, settle.min_s - (self.clock() - start)))
        tracks = {site: _Track() for site in sites}
        while True:
            pending = [s for s in sites if not tracks[s].done]
            now = self.clock()
            groups = self._group(pending)
            self.stats.readings += 1
            for site, values in groups.items():
                track = tracks[site]
                track.groups.append((now, mean(values)))
                track.done = self._stable(track.groups, settle, tolerance)
            if all(t.done for t in tracks.values()):
                break
            if self.clock() - start >= settle.max_s:
                self.stats.timeouts += 1
                break
        return {site: track.value for site, track in tracks.items()}

    def _stable(self, groups: list[tuple[float, float]], settle: Settle, tolerance: float) -> bool:
        """Is the latest group settled? Needs one group before it to compare with."""
        if len(groups) < 2:
            return False
        t_last, last = groups[-1]
        if not settle.auto:
            previous = groups[-2][1]
            if math.isinf(last) or math.isinf(previous):
                return True  # an overloaded site cannot settle; it must not hold the other sites up
            return abs(last - previous) <= tolerance
        # The residual predicted from the group before, or (less noisy, where the loop's fast
        # transient has left it) from the one before that. Groups are window averages at
        # least one integration apart, however fast the replies come back.
        spacing = self._group_time_s()
        for lag in (1, 2)[:len(groups) - 1]:
            t_ref, ref = groups[-1 - lag]
            interval = max(t_last - t_ref, lag * spacing)
            if predicted_residual(last, ref, interval, settle.tail_s) <= tolerance:
                return True
        return False


def _ac_mean(values: list[float]) -> float:
    """The mean of AC amplitudes; an overloaded sample (inf) makes the reading an overload."""
    return math.inf if any(math.isinf(v) for v in values) else sum(values) / len(values)

"""Settling of a loop node as a superposition of held-then-decaying exponentials.

After a source change at time t_e the node target jumps to its new value; the old error
(T_old - T_new) is held until the sources finish slewing (t_start), then decays with the
loop's time constant. Every change adds components, so overlapping transients add up.
Readings are window averages, computed in closed form.
"""

from __future__ import annotations

import bisect
import math
from dataclasses import dataclass, field

HISTORY_S = 600.0  # model seconds of history kept for late FETCh? windows


@dataclass(frozen=True)
class Component:
    t_created: float  # exists from here on
    t_start: float    # held at `amp` until here, then decays
    amp: float
    tau: float

    def value(self, t: float) -> float:
        if t < self.t_created:
            return 0.0
        if t < self.t_start:
            return self.amp
        return self.amp * math.exp(-(t - self.t_start) / self.tau)

    def integral(self, a: float, b: float) -> float:
        """Integral over [a, b]."""
        a = max(a, self.t_created)
        if b <= a:
            return 0.0
        total = 0.0
        if a < self.t_start:
            total += self.amp * (min(b, self.t_start) - a)
        lo = max(a, self.t_start)
        if b > lo:
            total += self.amp * self.tau * (math.exp(-(lo - self.t_start) / self.tau)
                                            - math.exp(-(b - self.t_start) / self.tau))
        return total


@dataclass
class NodeHistory:
    """Piecewise-constant target plus transient components; all times in model seconds."""

    initial: float
    times: list[float] = field(default_factory=list)
    targets: list[float] = field(default_factory=list)
    components: list[Component] = field(default_factory=list)

    def target_at(self, t: float) -> float:
        i = bisect.bisect_right(self.times, t)
        return self.targets[i - 1] if i else self.initial

    @property
    def target(self) -> float:
        return self.targets[-1] if self.targets else self.initial

    def change(self, t: float, new_target: float, t_start: float,
               extra: tuple[tuple[float, float], ...] = (), tau: float = 2.5e-3) -> None:
        """At `t` the target becomes `new_target`; the old error decays with `tau` after
        `t_start`; `extra` adds (amp, tau) components starting at `t_start` too."""
        old = self.target
        if new_target != old:
            self.times.append(t)
            self.targets.append(new_target)
            if math.isfinite(old - new_target):
                self.components.append(Component(t, max(t, t_start), old - new_target, tau))
        for amp, extra_tau in extra:
            if amp:
                self.components.append(Component(t, max(t, t_start), amp, extra_tau))
        self._prune(t)

    def jump(self, t: float, new_target: float) -> None:
        """At `t` the node is at `new_target` at once, with no transient (the ideal bench)."""
        self.components = []
        if new_target != self.target:
            self.times.append(t)
            self.targets.append(new_target)
        self._prune(t)

    def value(self, t: float) -> float:
        return self.target_at(t) + sum(c.value(t) for c in self.components)

    def mean(self, a: float, b: float) -> float:
        """Average of the node over [a, b] (its value at `a` when the window is empty)."""
        if b <= a:
            return self.value(a)
        total = 0.0
        edges = [a] + [t for t in self.times if a < t < b] + [b]
        for lo, hi in zip(edges, edges[1:], strict=False):
            total += self.target_at(lo) * (hi - lo)
        total += sum(c.integral(a, b) for c in self.components)
        return total / (b - a)

    def _prune(self, now: float) -> None:
        horizon = now - HISTORY_S
        self.components = [c for c in self.components
                            if c.t_start > horizon or abs(c.value(horizon)) > 1e-15]
        while len(self.times) > 1 and self.times[1] < horizon:
            self.initial = self.targets[0]
            del self.times[0]
            del self.targets[0]


def settle_time(error: float, fast_amp: float, tau_fast: float,
                slow_amp: float = 0.0, tau_slow: float = 30e-3) -> float:
    """Time after the slew ends until |fast_amp e^-t/tf + slow_amp (e^-t/ts - e^-t/tf)| stays
    below `error` (bisection on a monotone upper bound of the envelope)."""
    def bound(t: float) -> float:
        return (abs(fast_amp - slow_amp) * math.exp(-t / tau_fast)
                + abs(slow_amp) * math.exp(-t / tau_slow))

    if bound(0.0) <= error:
        return 0.0
    lo, hi = 0.0, 1.0
    while bound(hi) > error:
        hi *= 2.0
    for _ in range(60):
        mid = 0.5 * (lo + hi)
        lo, hi = (mid, hi) if bound(mid) > error else (lo, mid)
    return hi

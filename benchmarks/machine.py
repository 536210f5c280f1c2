"""The machine the figures were taken on, and whether other work was running meanwhile.

Timing figures on a small shared machine move with whatever else runs on it, so every
section of the benchmark is watched: the CPU time the *other* processes took while it ran
(the machine's busy time from /proc/stat, minus this process's own CPU time and that of its
children, e.g. the bench processes, which have ended by the section's end). A section is
marked as taken under load when other work held more than OTHER_CPU_SHARE of the cores. The
1-minute load average is printed too, and warned about when it is high at the benchmark's
start; it does not mark a section by itself, because it lags by about a minute and counts
the benchmark's own earlier sections (and work that has already ended).
"""

from __future__ import annotations

import os
import platform
import resource
import sys
import time
from dataclasses import dataclass, field
from pathlib import Path

import numpy
import pandas
import pyvisa

# A warning when the 1-minute load average at the start is above this many tasks per core ...
LOAD_PER_CORE = 0.5
# ... and a section counts as loaded when other processes took more than this share of all
# cores' time while it ran (half a core of two).
OTHER_CPU_SHARE = 0.25


def cpu_model() -> str:
    """The CPU's model name (Linux /proc/cpuinfo), else what platform knows."""
    try:
        for line in Path("/proc/cpuinfo").read_text(encoding="utf-8").splitlines():
            if line.lower().startswith("model name"):
                return line.split(":", 1)[1].strip()
    except OSError:
        pass
    return platform.processor() or platform.machine()


def load_average() -> tuple[float, float, float] | None:
    try:
        return os.getloadavg()
    except OSError:
        return None


def busy_at_start(info: dict[str, object]) -> bool:
    """Was the machine busy when the benchmark started (1-minute load average per core)?"""
    load, cores = info.get("load_average_at_start"), info.get("cores") or 1
    return isinstance(load, list) and isinstance(cores, int) and load[0] > LOAD_PER_CORE * cores


def machine_info() -> dict[str, object]:
    load = load_average()
    return {"cpu": cpu_model(), "cores": os.cpu_count() or 0, "python": sys.version.split()[0],
            "numpy": numpy.__version__, "pandas": pandas.__version__, "pyvisa": pyvisa.__version__,
            "platform": platform.platform(), "processor": platform.machine(),
            "load_average_at_start": [round(v, 2) for v in load] if load else None}


def _machine_busy_s() -> float | None:
    """Seconds of CPU time all processes have used since boot (user, nice, system, irq,
    softirq, steal of the `cpu` line of /proc/stat), or None off Linux."""
    try:
        fields = Path("/proc/stat").read_text(encoding="utf-8").splitlines()[0].split()
    except OSError:
        return None
    if fields[0] != "cpu":
        return None
    ticks = os.sysconf("SC_CLK_TCK")
    user, nice, system, _idle, _iowait, irq, softirq, steal = (int(v) for v in fields[1:9])
    return (user + nice + system + irq + softirq + steal) / ticks


def _own_cpu_s() -> float:
    """CPU time of this process and of its children that have ended (the bench processes)."""
    own = resource.getrusage(resource.RUSAGE_SELF)
    children = resource.getrusage(resource.RUSAGE_CHILDREN)
    return own.ru_utime + own.ru_stime + children.ru_utime + children.ru_stime


@dataclass
class LoadWatch:
    """`with LoadWatch(name) as watch:` around one section; `watch.figures()` after it."""

    name: str
    cores: int = field(default_factory=lambda: os.cpu_count() or 1)
    load_at_start: float | None = None
    other_cpu_share: float | None = None
    wall_s: float = 0.0
    _start: tuple[float, float | None, float] = (0.0, None, 0.0)

    def __enter__(self) -> LoadWatch:
        load = load_average()
        self.load_at_start = load[0] if load else None
        self._start = (time.monotonic(), _machine_busy_s(), _own_cpu_s())
        return self

    def __exit__(self, *exc: object) -> None:
        wall0, busy0, own0 = self._start
        self.wall_s = time.monotonic() - wall0
        busy1 = _machine_busy_s()
        if busy0 is not None and busy1 is not None and self.wall_s > 0:
            others = max(0.0, (busy1 - busy0) - (_own_cpu_s() - own0))
            self.other_cpu_share = others / (self.wall_s * self.cores)

    @property
    def loaded(self) -> bool:
        return self.other_cpu_share is not None and self.other_cpu_share > OTHER_CPU_SHARE

    def figures(self) -> dict[str, object]:
        return {"load_average_1m_at_start": round(self.load_at_start, 2) if self.load_at_start is not None else None,
                "other_processes_cpu_share": (round(self.other_cpu_share, 3)
                                              if self.other_cpu_share is not None else None),
                "wall_s": round(self.wall_s, 1), "loaded": self.loaded}

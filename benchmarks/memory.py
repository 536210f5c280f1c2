"""Memory figures: the station's RSS over a long, time-compressed dry run, and the peak RSS of
the 1,000,000-row summary in a process of its own.

RSS is read from /proc/self/status (VmRSS, Linux); the peak of a process is its own
`ru_maxrss` (kilobytes on Linux), read by that process at its end, so the bench processes
the benchmark starts never count in it.
"""

from __future__ import annotations

import json
import resource
import subprocess
import sys
from collections.abc import Callable
from dataclasses import dataclass, field
from pathlib import Path

from benchmarks.lot_run import run_lot
from sim_instruments.bench import SimSettings
from station.datalog.writer import PartRecord


def rss_mb() -> float:
    """Resident set size of this process now, MB (10^6 bytes)."""
    for line in Path("/proc/self/status").read_text(encoding="utf-8").splitlines():
        if line.startswith("VmRSS:"):
            return int(line.split()[1]) * 1024 / 1e6
    raise OSError("no VmRSS in /proc/self/status (the memory figures need Linux)")


def peak_rss_mb() -> float:
    """Largest RSS this process has had, MB (ru_maxrss is in kB on Linux)."""
    return resource.getrusage(resource.RUSAGE_SELF).ru_maxrss * 1024 / 1e6


@dataclass
class RssTrace:
    """The station's RSS after chosen part counts, sampled from the lot's per-part callback."""

    at: tuple[int, ...]
    rss: dict[int, float] = field(default_factory=dict)
    parts: int = 0

    def __call__(self, record: PartRecord, tally: object) -> None:
        self.parts += 1
        if self.parts in self.at:
            self.rss[self.parts] = rss_mb()


def soak_rss(settings: SimSettings, sequence: Path, limits: Path, out: Path, first: int,
             last: int, sleep: Callable[[float], None] | None = None) -> dict[str, object]:
    """RSS after `last` parts minus after `first`, over one dry run of `settings`, the bench in
    a process of its own (its memory is not the station's)."""
    marks = sorted({first, last, *(n for n in (1000, 2000, 5000) if first < n < last)})
    trace = RssTrace(tuple(marks))
    run = run_lot(settings, sequence, limits, out, sleep=sleep, separate_process=True, on_part=trace)
    if last not in trace.rss or first not in trace.rss:
        raise RuntimeError(f"soak lot logged {trace.parts} parts, fewer than {last}")
    return {"soak_rss_growth_mb": trace.rss[last] - trace.rss[first],
            "soak_rss_mb": {str(n): round(v, 1) for n, v in sorted(trace.rss.items())},
            "soak_parts": trace.parts, "soak_wall_s": round(run.elapsed_s, 1)}


SUMMARY_CHILD = """
import json, sys, time
from benchmarks.memory import peak_rss_mb, rss_mb
from station.review.load import load_datalogs
from station.review.summary import summarise
before = rss_mb()
start = time.perf_counter()
summarise(load_datalogs([sys.argv[1]]))
seconds = time.perf_counter() - start
print(json.dumps({"peak_mb": peak_rss_mb(), "imports_mb": before, "seconds": seconds}))
"""


def summary_peak_rss(folder: Path) -> dict[str, float]:
    """Load and summarise the datalog `folder` in a fresh process: its peak RSS (imports
    included, as a `station summary` process has them), the RSS after the imports alone, and
    the time it took there."""
    done = subprocess.run([sys.executable, "-c", SUMMARY_CHILD, str(folder)], capture_output=True, text=True,
                          check=True, cwd=Path(__file__).resolve().parent.parent)
    found = json.loads(done.stdout.strip().splitlines()[-1])
    return {"summary_1m_peak_rss_mb": found["peak_mb"], "summary_imports_rss_mb": found["imports_mb"],
            "summary_fresh_process_s": found["seconds"]}

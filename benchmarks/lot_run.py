"""Run one lot of the station on a fresh simulated bench, as `station dry-run` does, and time it.

The station is driven through its own objects (plan, bench, runner, datalog writer): the
same path as the command line, without the console. Everything goes through pyvisa-py to the
simulator's loopback sockets.
"""

from __future__ import annotations

import tempfile
import time
from collections.abc import Callable
from dataclasses import dataclass, field
from pathlib import Path

import pandas as pd
import yaml

from benchmarks.bench_process import BenchProcess
from sim_instruments.bench import CommandRecord, SimBench, SimSettings
from station.config.plan import build_plan
from station.datalog.writer import DatalogWriter
from station.lot.bench import open_bench
from station.lot.runner import LotRunner, LotSettings, scaled_sleep
from station.lot.site_readings import ReadingStats


@dataclass
class LotRun:
    """What one lot run gives the benchmark."""

    folder: Path
    parts: pd.DataFrame           # parts.csv
    elapsed_s: float              # lot wall time, handler index time included
    start_wall: float             # time.time() when the lot started
    index_s: list[float]          # test time of each handler index (TEST_T), s
    stats: ReadingStats
    transactions: int             # SCPI messages the station sent
    cpu_s: float = 0.0            # the station process's CPU time (every thread) during the lot
    command_log: list[CommandRecord] = field(default_factory=list)
    sim: SimBench | None = None   # stopped bench (in process only): its truth stays readable

    @property
    def parts_count(self) -> int:
        return len(self.parts)

    @property
    def parts_per_hour(self) -> float:
        return 3600.0 * self.parts_count / self.elapsed_s

    @property
    def test_s_per_part(self) -> float:
        """Sum of the index test times over the parts (an index's sites share its time)."""
        return sum(self.index_s) / self.parts_count


def run_lot(settings: SimSettings, sequence: Path, limits: Path, out: Path,
            sleep: Callable[[float], None] | None = None, lot_id: str = "BENCH",
            separate_process: bool = False, on_part: Callable | None = None) -> LotRun:
    """Run a lot. At a sim speed above 1 the station's waits are scaled to model time; its
    clock is not: its settling compares groups by their integration time (model seconds)
    anyway, and its hard bound then stays in wall time, where its own overhead is.

    `separate_process`: the simulated bench runs in a process of its own
    (`benchmarks/bench_process.py`), as a real bench's instruments are other machines.
    `on_part` is told of every part logged, as the command line's live page is."""
    speed = settings.speed
    if sleep is None:
        sleep = scaled_sleep(speed)
    sim: SimBench | BenchProcess = BenchProcess(settings) if separate_process else SimBench(settings)
    with sim, tempfile.TemporaryDirectory() as temp:
        config = yaml.safe_load(sim.bench_config_text())
        bench_file = Path(temp) / "bench.yaml"
        bench_file.write_text(yaml.safe_dump(config, sort_keys=False), encoding="utf-8")
        plan = build_plan(bench_file, sequence, limits)
        writer = DatalogWriter(out, force=True)
        bench = open_bench(plan.bench)
        try:
            runner = LotRunner(plan, bench, writer, LotSettings(lot_id, "bench", "dry-run"), sleep=sleep,
                               on_part=on_part)
            start_wall = time.time()
            start = time.monotonic()
            cpu_start = time.process_time()
            tally = runner.run()
            cpu_s = time.process_time() - cpu_start
            elapsed = time.monotonic() - start
            transactions = sum(link.transactions for link in bench.all_links().values())
        finally:
            bench.close()
        if tally.stopped_because:
            raise RuntimeError(f"benchmark lot stopped: {tally.stopped_because}")
    sim.write_truth(out / "sim_truth.csv")  # after the stop: a bench process sends it then
    parts = pd.read_csv(out / "parts.csv")
    index_s = _index_times(parts)
    return LotRun(out, parts, elapsed, start_wall, index_s, runner.reader.stats, transactions, cpu_s,
                  list(sim.command_log), sim if isinstance(sim, SimBench) else None)


def _index_times(parts: pd.DataFrame) -> list[float]:
    """One TEST_T per handler index: the sites of an index are consecutive rows sharing it."""
    sites = int(parts["SITE_NUM"].max())
    times = []
    for start in range(0, len(parts), sites):
        times.append(float(parts["TEST_T"].iloc[start]) / 1000.0)
    return times

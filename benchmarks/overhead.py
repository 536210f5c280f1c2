"""The station's own overhead: the same lot on an ideal bench (no settling, no integration
wait, no handler index time), against a minimal pyvisa script replaying its SCPI transactions.

The station runs with its waits turned into no-ops (on an ideal bench every physics wait is
zero, so a wait would only measure `time.sleep`). Its transactions during the lot are taken
from the simulator's command log and replayed, in the same order, with plain pyvisa-py on a
fresh ideal bench of the same seed: one write or one query per logged message, nothing else.

By default the simulated bench runs in a process of its own for the station and for both
replays alike (`benchmarks/bench_process.py`): a real bench's instruments are other machines,
and in one process the station's DMM worker threads would contend for the GIL with the
simulator's server threads. `separate_process=False` gives the old in-process figure.
"""

from __future__ import annotations

import dataclasses
import time
from pathlib import Path

import pyvisa

from benchmarks.bench_process import BenchProcess
from benchmarks.lot_run import run_lot
from sim_instruments.bench import CommandRecord, SimBench, SimSettings


def ideal_settings(settings: SimSettings) -> SimSettings:
    return dataclasses.replace(settings, ideal=True, log_commands=True, handler_index_s=0.0)


def _replay_bench(settings: SimSettings, separate_process: bool) -> SimBench | BenchProcess:
    """A fresh ideal bench of the same seed, without the command log, laid out as the station's."""
    fresh = dataclasses.replace(ideal_settings(settings), log_commands=False)
    return BenchProcess(fresh) if separate_process else SimBench(fresh)


def station_on_ideal_bench(settings: SimSettings, sequence: Path, limits: Path, out: Path,
                           separate_process: bool = True) -> tuple[float, list[CommandRecord], int]:
    """(station wall time, its transactions in that time, parts) on an ideal bench.

    The window runs from the lot's start to the end of its last part, so the bench opening
    before and the safe-state ramp after (with its deliberate pauses) are in neither figure.
    """
    run = run_lot(ideal_settings(settings), sequence, limits, out, sleep=lambda seconds: None,
                  separate_process=separate_process)
    end_wall = float(run.parts["END_T"].max())
    records = sorted((r for r in run.command_log if run.start_wall <= r.wall_time <= end_wall),
                     key=lambda r: r.wall_time)
    return end_wall - run.start_wall, records, run.parts_count


def _timed_replay(records: list[CommandRecord], endpoints: dict) -> float:
    """Send each recorded message to its role's endpoint (a pyvisa resource or a ScpiLink: both
    have write and query), as a write or a query as the station sent it; the wall time."""
    start = time.perf_counter()
    for record in records:
        endpoint = endpoints[record.role]
        if record.reply is None:
            endpoint.write(record.message)
        else:
            endpoint.query(record.message)
    return time.perf_counter() - start


def replay(settings: SimSettings, records: list[CommandRecord], separate_process: bool = True) -> float:
    """Wall time of sending `records` with plain pyvisa to a fresh ideal bench."""
    sim = _replay_bench(settings, separate_process)
    with sim:
        manager = pyvisa.ResourceManager("@py")
        resources = {role: manager.open_resource(res, read_termination="\n", write_termination="\n",
                                                 timeout=5000) for role, res in sim.resources.items()}
        try:
            return _timed_replay(records, resources)
        finally:
            for resource in resources.values():
                resource.close()


def replay_through_links(settings: SimSettings, records: list[CommandRecord],
                         separate_process: bool = True) -> float:
    """The same replay through the station's own ScpiLink (drivers/scpi_link): how much of the
    overhead is the link layer (retries, stale-reply checks) rather than the sequencer."""
    from drivers.scpi_link import ScpiLink

    sim = _replay_bench(settings, separate_process)
    with sim:
        links = {role: ScpiLink(role, res) for role, res in sim.resources.items()}
        for link in links.values():
            link.open()
        try:
            return _timed_replay(records, links)
        finally:
            for link in links.values():
                link.close()

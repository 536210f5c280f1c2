"""Round trip of one short query over a raw SCPI socket and over HiSLIP, on loopback.

Two simulated benches run in processes of their own (benchmarks/bench_process.py), one
served over raw sockets, one over HiSLIP; the station's own link (drivers/scpi_link.ScpiLink,
which opens the resource through pyvisa-py with the transport's terminations) sends `*IDN?`
to each DMM in turn and reads the reply. Each figure is the median of the per-query times;
the key is HiSLIP's median over the socket's.
"""

from __future__ import annotations

import dataclasses
import statistics
import time

from benchmarks.bench_process import BenchProcess
from drivers.retry import NO_RETRY
from drivers.scpi_link import ScpiLink
from sim_instruments.bench import TRANSPORTS, SimSettings

WARM_UP = 50


def interleaved_query_times(resources: dict[str, str], queries: int,
                            command: str = "*IDN?") -> dict[str, list[float]]:
    """Seconds per query of `command` on each resource, one query on each in turn, so load
    on the machine falls on every transport alike (2 cores shared: the spread is scheduling)."""
    links = {name: ScpiLink("dmm1", resource, retry=NO_RETRY) for name, resource in resources.items()}
    times: dict[str, list[float]] = {name: [] for name in links}
    try:
        for link in links.values():
            link.open()
            for _ in range(WARM_UP):
                link.query(command)
        for _ in range(queries):
            for name, link in links.items():
                started = time.perf_counter()
                link.query(command)
                times[name].append(time.perf_counter() - started)
        return times
    finally:
        for link in links.values():
            link.close()


def transport_round_trips(queries: int, seed: int = 11) -> dict:
    benches = {transport: BenchProcess(dataclasses.replace(SimSettings(seed=seed, sites=1, parts=1),
                                                           transport=transport))
               for transport in TRANSPORTS}
    try:
        resources = {transport: bench.start().resources["dmm1"] for transport, bench in benches.items()}
        times = interleaved_query_times(resources, queries)
    finally:
        for bench in benches.values():
            bench.stop()
    medians = {t: statistics.median(v) for t, v in times.items()}
    spread = {}
    for transport, values in times.items():
        quartiles = statistics.quantiles(values, n=4)
        spread[transport] = f"{1e6 * quartiles[0]:.0f} to {1e6 * quartiles[2]:.0f} us (quartiles)"
    return {"hislip_round_trip_ratio": medians["hislip"] / medians["socket"],
            "round_trip_us": {t: 1e6 * m for t, m in medians.items()},
            "round_trip_spread": spread, "round_trip_queries": queries}


if __name__ == "__main__":
    figures = transport_round_trips(2000)
    for key, value in figures.items():
        print(f"{key}: {value}")

"""`python -m benchmarks.live_page [--quick] [--json FILE]`: does the live page slow the lot?

The same 4-site lot (seed 11, the demo sequence, sim speed 1, the simulated bench in a
process of its own) runs alternately without the page and with it: the page served from the
lot's process as `--view` serves it (hub thread, uvicorn thread, poked at every part), ten
clients reading the event stream and one that connects and never reads, all eleven in a
process of their own (as browsers are). The figure is the median test time per part with the
page over the median without it. See benchmarks/README.md.
"""

from __future__ import annotations

import argparse
import json
import os
import select
import socket
import statistics
import subprocess
import sys
import tempfile
import threading
import time
from pathlib import Path

from benchmarks.lot_run import run_lot
from benchmarks.machine import machine_info
from sim_instruments.bench import SimSettings
from station.demo import DEMO_LIMITS, DEMO_SEQUENCE
from station.view.address import ViewAddress
from station.view.hub import SnapshotHub
from station.view.server import PageServer
from station.view.snapshot import LotSnapshots

SEED = 11
READERS = 10


def rss_bytes() -> int:
    for line in Path("/proc/self/status").read_text().splitlines():
        if line.startswith("VmRSS:"):
            return int(line.split()[1]) * 1024
    return 0


def one_lot(work: Path, parts: int, with_page: bool) -> dict:
    out = work / ("page" if with_page else "plain")
    settings = SimSettings(seed=SEED, sites=4, parts=parts, speed=1.0)
    if not with_page:
        lot = run_lot(settings, DEMO_SEQUENCE, DEMO_LIMITS, out, separate_process=True)
        return {"test_s_per_part": lot.test_s_per_part, "wall_s_per_part": lot.elapsed_s / lot.parts_count}
    hub = SnapshotHub(LotSnapshots(out, parts))
    server = PageServer(hub, ViewAddress("127.0.0.1", 0))
    server.start()
    clients = subprocess.Popen([sys.executable, "-m", "benchmarks.live_page", "--clients", str(server.port)],
                               stdin=subprocess.PIPE, stdout=subprocess.PIPE, text=True)
    try:
        assert clients.stdout is not None and clients.stdin is not None
        clients.stdout.readline()                  # "connected"
        deadline = time.monotonic() + 10
        while hub.pages < READERS + 1 and time.monotonic() < deadline:
            time.sleep(0.05)
        pages_at_start = hub.pages
        rss_before = rss_bytes()
        lot = run_lot(settings, DEMO_SEQUENCE, DEMO_LIMITS, out, separate_process=True, on_part=hub.poke)
        rss_after = rss_bytes()
        pages_at_end = hub.pages                   # the page that never reads is still open
        clients.stdin.close()
        report = json.loads(clients.stdout.readline())
        clients.wait(timeout=30)
    finally:
        if clients.poll() is None:
            clients.kill()
        server.stop()
    return {"test_s_per_part": lot.test_s_per_part, "wall_s_per_part": lot.elapsed_s / lot.parts_count,
            "pages_at_start": pages_at_start, "pages_at_end": pages_at_end, "snapshots": hub.computed, "rss_growth_mb": (rss_after - rss_before) / 1e6,
            **report}


def measure(parts: int, repeats: int) -> dict:
    runs: dict[str, list[dict]] = {"plain": [], "page": []}
    with tempfile.TemporaryDirectory(prefix="ampscreen-live-page-") as temp:
        for _ in range(repeats):                   # alternate, so drifts of the machine hit both
            runs["plain"].append(one_lot(Path(temp), parts, with_page=False))
            runs["page"].append(one_lot(Path(temp), parts, with_page=True))
    plain = statistics.median(r["test_s_per_part"] for r in runs["plain"])
    page = statistics.median(r["test_s_per_part"] for r in runs["page"])
    plain_wall = statistics.median(r["wall_s_per_part"] for r in runs["plain"])
    page_wall = statistics.median(r["wall_s_per_part"] for r in runs["page"])
    return {"live_page_test_time_ratio": page / plain, "live_page_wall_time_ratio": page_wall / plain_wall,
            "test_s_per_part": {"plain": plain, "page": page},
            "test_s_per_part_runs": {k: [round(r["test_s_per_part"], 4) for r in v] for k, v in runs.items()},
            "page_runs": runs["page"], "parts": parts, "repeats": repeats}


# --- the clients' process ---------------------------------------------------------------

def run_clients(port: int) -> None:
    """Ten readers and one page that never reads; report when stdin closes."""
    stop = threading.Event()
    counts = [0] * READERS
    nbytes = [0] * READERS

    def reader(index: int) -> None:
        sock = socket.create_connection(("127.0.0.1", port))
        sock.sendall(f"GET /events HTTP/1.1\r\nHost: 127.0.0.1:{port}\r\n\r\n".encode())
        sock.settimeout(0.5)
        while not stop.is_set():
            try:
                data = sock.recv(65536)
            except TimeoutError:
                continue
            if not data:
                break
            nbytes[index] += len(data)
            counts[index] += data.count(b"event: snapshot")
        sock.close()

    threads = [threading.Thread(target=reader, args=(i,), daemon=True) for i in range(READERS)]
    for thread in threads:
        thread.start()
    stuck = socket.socket()
    stuck.setsockopt(socket.SOL_SOCKET, socket.SO_RCVBUF, 4096)
    stuck.connect(("127.0.0.1", port))
    stuck.sendall(f"GET /events HTTP/1.1\r\nHost: 127.0.0.1:{port}\r\n\r\n".encode())
    print("connected", flush=True)
    while True:                                     # until the benchmark closes our stdin
        ready, _, _ = select.select([sys.stdin], [], [], 1.0)
        if ready and not sys.stdin.readline():
            break
    stop.set()
    for thread in threads:
        thread.join(timeout=5)
    print(json.dumps({"events_per_reader_min": min(counts), "events_per_reader_max": max(counts),
                      "bytes_per_reader_max": max(nbytes)}), flush=True)
    stuck.close()


def main(argv: list[str] | None = None) -> dict:
    parser = argparse.ArgumentParser(prog="python -m benchmarks.live_page", description=__doc__)
    parser.add_argument("--quick", action="store_true", help="8 parts, one run each (about half a minute)")
    parser.add_argument("--json", type=Path, help="also write the figures here as JSON")
    parser.add_argument("--clients", type=int, help=argparse.SUPPRESS)   # the clients' child process
    args = parser.parse_args(argv)
    if args.clients:
        run_clients(args.clients)
        return {}
    parts, repeats = (8, 1) if args.quick else (16, 3)
    figures = {"mode": "quick" if args.quick else "full", "machine": machine_info(), **measure(parts, repeats)}
    print(f"live page, {READERS} reading clients + 1 that never reads, {parts}-part 4-site lot, "
          f"{repeats} run(s) each (cores: {os.cpu_count()})")
    print(f"  live_page_test_time_ratio  {figures['live_page_test_time_ratio']:.3f}  "
          f"(test time per part with the page / without; {figures['test_s_per_part']['page']:.3f} s / "
          f"{figures['test_s_per_part']['plain']:.3f} s)")
    print(f"  live_page_wall_time_ratio  {figures['live_page_wall_time_ratio']:.3f}")
    print(f"  runs (test s/part): {figures['test_s_per_part_runs']}")
    for run in figures["page_runs"]:
        print(f"  page run: {run['pages_at_start']} pages open at the start, {run['pages_at_end']} at the end, "
              f"{run['snapshots']} snapshots, events per reader "
              f"{run['events_per_reader_min']}-{run['events_per_reader_max']}, server RSS growth "
              f"{run['rss_growth_mb']:.1f} MB")
    if args.json:
        args.json.write_text(json.dumps(figures, indent=2), encoding="utf-8")
    return figures


if __name__ == "__main__":
    main()

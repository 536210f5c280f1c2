"""Soak: a long `station run` against the simulated bench with faults injected at random.

    python -m tests.support.soak_run --parts 2000            # the long soak (minutes)
    python -m tests.support.soak_run --parts 60 --reference  # what the test suite runs

A SimBench serves the lot from this process; `station run` screens it in a subprocess with
the reduced sequence of tests/support/reliability_bench.py. A seeded injector thread picks, at random
intervals, an instrument and a transient fault (latency, timeout, dropped connection,
garbage, error-queue entry) and applies it through the simulator's fault settings. A lot that
a fault storm stops (exit 3, `--max-faults` in a row) is resumed with `station run --resume`,
as an operator would. At the end it checks that nothing was lost or doubled and prints the
figures as JSON. With
`--reference`, the same lot is run again without faults and no part may fail where the
fault-free run passes it. Exit code 0 when every check holds.
"""

from __future__ import annotations

import argparse
import json
import sys
import tempfile
import threading
import time
from collections import Counter
from pathlib import Path

import numpy as np

from sim_instruments.bench import SimBench  # noqa: E402
from station.cli.main import DEMO_LIMITS  # noqa: E402
from station.config.limit_tables import load_limit_table  # noqa: E402
from tests.support.reliability_bench import (  # noqa: E402
    assert_bench_safe,
    assert_whole_parts,
    final_rows,
    part_count,
    run_args,
    served,
    start,
    station_command,
    wait_for_rows,
    write_sequence,
)

MAX_RESUMES = 20
KINDS = ("latency", "timeout", "drop", "garbage", "error")
ERROR_CODES = (-222, -221, -113, -350)


class FaultInjector(threading.Thread):
    """Applies a random transient fault every `mean_s` seconds on average (exponential)."""

    def __init__(self, sim: SimBench, seed: int, mean_s: float) -> None:
        super().__init__(daemon=True, name="soak-faults")
        self.sim = sim
        self.rng = np.random.default_rng([seed, 4242])
        self.mean_s = mean_s
        self.stop = threading.Event()
        self.paused = threading.Event()     # while the "operator" restarts a stopped lot
        self.injected: Counter[str] = Counter()
        self.by_role: Counter[str] = Counter()

    def run(self) -> None:
        roles = sorted(self.sim.instruments)
        while not self.stop.wait(float(self.rng.exponential(self.mean_s))):
            if self.paused.is_set():
                continue
            role = str(self.rng.choice(roles))
            kind = str(self.rng.choice(KINDS))
            faults = self.sim.faults(role)
            if kind == "latency":       # a burst of slow replies, then normal again
                faults.latency_s = float(self.rng.uniform(0.1, 1.0))
                threading.Timer(float(self.rng.uniform(0.2, 1.0)), lambda f=faults: setattr(f, "latency_s", 0.0)).start()
            elif kind == "timeout":
                faults.timeout_next = int(self.rng.integers(1, 7))
            elif kind == "drop":
                faults.drop_after = int(self.rng.integers(0, 6))
            elif kind == "garbage":
                faults.garbage_next = int(self.rng.integers(1, 4))
            else:
                faults.push_error(int(self.rng.choice(ERROR_CODES)))
            self.injected[kind] += 1
            self.by_role[role] += 1


def screen(folder: Path, parts: int, seed: int, speed: float, sites: int, fault_mean_s: float | None,
           timeout_s: float, max_faults: int = 5) -> dict:
    """One lot; returns the figures and the final hard bin of every part."""
    sequence = write_sequence(folder)
    out = folder / "lot"
    with served(folder, seed=seed, parts=parts, sites=sites, speed=speed, timeout_s=timeout_s) as (sim, bench):
        injector = FaultInjector(sim, seed, fault_mean_s) if fault_mean_s else None
        started = time.monotonic()
        process = start(run_args(bench, sequence, out, f"SOAK-{seed}", "--max-faults", str(max_faults)))
        if injector:            # mid-lot: from the first logged part on
            wait_for_rows(out, 1, process, timeout_s=120)
            injector.start()
        stdout, stderr = process.communicate()
        stops: list[str] = []
        # A lot stopped by a fault storm (exit 3) is resumed, as an operator would once the
        # bench answers again; the simulated handler still holds the parts under test.
        while _stopped(process.returncode, stdout + stderr) and len(stops) < MAX_RESUMES:
            stops.append(next((line for line in (stdout + stderr).splitlines()
                               if line.startswith(("lot stopped", "Error"))), "?"))
            if injector:
                injector.paused.set()
            sim.clear_faults()
            assert_bench_safe(sim)
            rows = part_count(out)
            process = start(station_command("run", "--bench", str(bench), "--sequence", str(sequence),
                                            "--limits", str(DEMO_LIMITS), "--resume", str(out),
                                            "--max-faults", str(max_faults)))
            if injector:        # faults again once the resumed lot is under way
                _wait_rows_or_end(out, rows + 1, process)
                injector.paused.clear()
            stdout, stderr = process.communicate()
        if injector:
            injector.stop.set()
            injector.join()
        wall_s = time.monotonic() - started
        sim.clear_faults()
        assert_bench_safe(sim)
        truth_ids = [p.part_id for p in sim.truth()]
    if process.returncode != 0:
        raise AssertionError(f"station run ended with {process.returncode}:\n{stdout[-3000:]}\n{stderr[-3000:]}")
    rows, _ = assert_whole_parts(out)
    finals = final_rows(rows)
    lot = json.loads((out / "lot.json").read_text(encoding="utf-8"))
    return {
        "parts": len(truth_ids), "rows": len(rows),
        "retests": sum(r["RETEST"] == "1" for r in rows),
        "tester_fault_rows": sum(bool(r["FAULT"]) for r in rows),
        "faulted_attempts": lot.get("faulted_attempts", 0),
        "link_retries": sum(lot.get("instrument_retries", {}).values()),
        "faults_injected": dict(injector.injected) if injector else {},
        "faults_by_instrument": dict(injector.by_role) if injector else {},
        "stops_resumed": len(stops),
        "stop_reasons": stops,
        "wall_s": round(wall_s, 1),
        "parts_per_hour": round(3600 * len(truth_ids) / wall_s),
        "_truth_ids": truth_ids,
        "_bins": {pid: int(r["HARD_BIN"]) for pid, r in finals.items()},
        "_complete": lot.get("complete"),
    }


def _stopped(code: int, output: str) -> bool:
    """Stopped by faults (3), or the bench could not be opened again while faulty (1)."""
    return code == 3 or (code == 1 and "cannot open the bench" in output)


def _wait_rows_or_end(out: Path, rows: int, process) -> None:
    while part_count(out) < rows and process.poll() is None:
        time.sleep(0.05)


def check(result: dict, reference: dict | None) -> list[str]:
    """What must hold; returns the problems (empty: all good)."""
    table = load_limit_table(DEMO_LIMITS)
    problems = []
    bins = result["_bins"]
    if sorted(bins) != sorted(result["_truth_ids"]):
        problems.append("the final rows are not every part of the lot exactly once")
    if result["rows"] != result["parts"] + result["retests"]:
        problems.append(f"rows {result['rows']} != parts {result['parts']} + retests {result['retests']}")
    if any(b == table.tester_fault_hard_bin for b in bins.values()):
        problems.append("a part ended in the tester-fault bin")
    if not result["_complete"]:
        problems.append("lot.json does not say complete")
    if reference is not None:
        for pid, hard in bins.items():
            if not table.hard_bins[hard].passing and table.hard_bins[reference["_bins"][pid]].passing:
                problems.append(f"{pid} failed (bin {hard}) but passes in the fault-free run")
    return problems


def main(argv: list[str] | None = None) -> int:
    parser = argparse.ArgumentParser(description=__doc__.splitlines()[0])
    parser.add_argument("--parts", type=int, default=2000)
    parser.add_argument("--sites", type=int, default=4)
    parser.add_argument("--seed", type=int, default=11)
    parser.add_argument("--speed", type=float, default=50.0, help="sim speed (model time per wall time)")
    parser.add_argument("--fault-every", type=float, default=3.0, help="mean wall seconds between faults")
    parser.add_argument("--timeout", type=float, default=0.3, help="link timeout in wall seconds")
    parser.add_argument("--max-faults", type=int, default=5, help="station run --max-faults")
    parser.add_argument("--reference", action="store_true", help="also run the lot without faults and compare")
    parser.add_argument("--keep", type=Path, default=None, help="keep the datalogs in this folder")
    args = parser.parse_args(argv)
    with tempfile.TemporaryDirectory() as temp:
        root = args.keep or Path(temp)
        (root / "faulted").mkdir(parents=True, exist_ok=True)
        result = screen(root / "faulted", args.parts, args.seed, args.speed, args.sites, args.fault_every,
                        args.timeout, args.max_faults)
        reference = None
        if args.reference:
            (root / "reference").mkdir(parents=True, exist_ok=True)
            reference = screen(root / "reference", args.parts, args.seed, args.speed, args.sites, None,
                               args.timeout)
        problems = check(result, reference)
    figures = {k: v for k, v in result.items() if not k.startswith("_")}
    figures["checks"] = problems or "all passed"
    print(json.dumps(figures, indent=2))
    return 1 if problems else 0


if __name__ == "__main__":
    sys.exit(main())

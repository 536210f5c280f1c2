"""Shared pieces of the reliability tests and the soak: a simulated bench served from the test
process, `station run` in a subprocess against it, and checks on the datalog it leaves.

The sequence below is a reduced PX-401 screen (INVENTED demo data, like the product): fewer
common-mode points, still one in every region of the demo limit table, so lots run fast.
"""

from __future__ import annotations

import csv
import json
import os
import subprocess
import sys
import time
from collections.abc import Iterator
from contextlib import contextmanager
from pathlib import Path

import yaml

from sim_instruments.bench import SimBench, SimSettings
from station.demo import DEMO_LIMITS

ROOT = Path(__file__).resolve().parents[2]

FAST_SEQUENCE = """\
# Reduced PX-401 screen for the reliability tests and the soak (INVENTED demo data).
sequence: px401-reliability
product: PX-401
supply: {span: 10 V, compliance: 20 mA}
dmm: {nplc: 1, range: 10 V, autozero: false}
settle: {stable_within: 0.5 uV, min: 10 ms, max: 200 ms}
stop_on_fail: false
tests:
  - {kind: contact, retest: 1}
  - {kind: offset, average: 2}
  - kind: cm_sweep
    points: ["V- - 0.1 V", "V- + 3 V", "mid", "V+ - 2 V", "V+ - 1.4 V", "V+ - 1.2 V", "V+ - 0.6 V", "V+ + 0.1 V"]
  - {kind: gain, levels: [-3 V, 3 V], average: 2}
  - {kind: supply_rejection, spans: [8 V, 12 V], average: 2}
  - {kind: supply_current}
  - {kind: bias_current, settle: {wait: 30 ms}}
"""


def write_sequence(folder: Path) -> Path:
    path = Path(folder) / "fast_sequence.yaml"
    path.write_text(FAST_SEQUENCE, encoding="utf-8")
    return path


def write_bench(sim: SimBench, path: Path, timeout_s: float = 1.0, handler: bool = True) -> Path:
    """The sim's bench config with short link timeouts (a swallowed reply costs little)."""
    config = yaml.safe_load(sim.bench_config_text())
    instruments = config["instruments"]
    for role, entry in list(instruments.items()):
        entries = entry if isinstance(entry, list) else [entry]
        for item in entries:
            item["timeout"] = f"{timeout_s} s"
        if role == "handler" and not handler:
            del instruments[role]
    path.write_text(yaml.safe_dump(config, sort_keys=False), encoding="utf-8")
    return path


@contextmanager
def served(tmp_path: Path, **settings) -> Iterator[tuple[SimBench, Path]]:
    """A SimBench on loopback in this process and a bench config for it."""
    options = {"seed": 3, "parts": 16, "sites": 4, "speed": 20.0, **settings}
    timeout_s = options.pop("timeout_s", 1.0)
    handler = options.pop("handler", True)
    with SimBench(SimSettings(**options)) as sim:
        yield sim, write_bench(sim, tmp_path / "bench.yaml", timeout_s, handler)


def station_command(*args: str) -> list[str]:
    return [sys.executable, "-m", "station.cli", *args]


def run_args(bench: Path, sequence: Path, out: Path, lot: str = "REL-1", *extra: str) -> list[str]:
    return station_command("run", "--bench", str(bench), "--sequence", str(sequence),
                           "--limits", str(DEMO_LIMITS), "--lot", lot, "--out", str(out), *extra)


def start(command: list[str], stdin: int | None = None) -> subprocess.Popen:
    env = {**os.environ, "COLUMNS": "200", "PYTHONUNBUFFERED": "1"}
    return subprocess.Popen(command, cwd=ROOT, stdout=subprocess.PIPE, stderr=subprocess.PIPE,
                            stdin=stdin, text=True, env=env)


def wait_for_rows(out: Path, rows: int, process: subprocess.Popen, timeout_s: float = 60.0) -> None:
    """Until parts.csv holds `rows` data rows (fails if the process ends first)."""
    deadline = time.monotonic() + timeout_s
    while time.monotonic() < deadline:
        if part_count(out) >= rows:
            return
        if process.poll() is not None:
            raise AssertionError(f"station ended early ({process.returncode}): {process.communicate()}")
        time.sleep(0.05)
    raise AssertionError(f"parts.csv did not reach {rows} rows in {timeout_s} s")


def wait_for_marker(out: Path, timeout_s: float = 30.0) -> None:
    """Until an index is under test (in_progress.json exists): most of the time, it is."""
    deadline = time.monotonic() + timeout_s
    while not (Path(out) / "in_progress.json").exists():
        assert time.monotonic() < deadline, "no index under test"
        time.sleep(0.005)


def marker_ids(out: Path) -> set[str]:
    """Ids under test per in_progress.json; none if the process stopped between two indices."""
    try:
        return set(json.loads((Path(out) / "in_progress.json").read_text(encoding="utf-8"))["ids"])
    except FileNotFoundError:
        return set()


def part_count(out: Path) -> int:
    try:
        text = (Path(out) / "parts.csv").read_text(encoding="utf-8")
    except OSError:
        return 0
    return max(0, text.count("\n") - 1)


def read_csv(path: Path) -> list[dict[str, str]]:
    with open(path, newline="", encoding="utf-8") as handle:
        return list(csv.DictReader(handle))


def assert_whole_parts(out: Path) -> tuple[list[dict[str, str]], list[dict[str, str]]]:
    """Every logged part has its results, no result lacks its part, no line is torn."""
    for name in ("parts.csv", "results.csv"):
        assert (out / name).read_text(encoding="utf-8").endswith("\n"), f"{name}: torn last line"
    parts, results = read_csv(out / "parts.csv"), read_csv(out / "results.csv")
    with_rows = {r["PART_ID"] for r in results}
    logged = {p["PART_ID"] for p in parts}
    assert with_rows <= logged, f"results without a part row: {sorted(with_rows - logged)}"
    for part in parts:
        if not part["FAULT"]:
            assert part["PART_ID"] in with_rows, f"{part['PART_ID']} has no result rows"
    return parts, results


def assert_bench_safe(sim: SimBench) -> None:
    """Every output off, every source at zero, every relay open (the simulator's own state)."""
    state = sim.state()
    for channel in ("ch1", "ch2"):
        assert state["supply"][channel]["output"] is False, state["supply"]
        assert state["supply"][channel]["programmed_v"] == 0.0, state["supply"]
    assert state["force"] == {"level_v": 0.0, "output": False}
    assert state["relays_closed"] == []


def final_rows(parts: list[dict[str, str]]) -> dict[str, dict[str, str]]:
    """The last row of every part id (a retest supersedes the attempts before it)."""
    last: dict[str, dict[str, str]] = {}
    for part in parts:
        last[part["PART_ID"]] = part
    return last

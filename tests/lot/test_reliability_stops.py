"""Stopping `station run` from outside, mid-lot, through real sockets and a real subprocess.

SIGINT (Ctrl-C) and SIGTERM: exit 3, the simulator reports every output off and every source
at zero, lot.json records the safe state, and the datalog holds only whole parts. A second
Ctrl-C during the safe state does not cut it short. SIGKILL (nothing runs on the way out):
`--resume` finishes the lot with every part exactly once, the interrupted ones flagged
RETEST=1, and the parts logged before the kill unchanged.
"""

from __future__ import annotations

import json
import signal
import time

import pytest

from station.demo import DEMO_LIMITS
from tests.support.reliability_bench import (
    assert_bench_safe,
    assert_whole_parts,
    final_rows,
    marker_ids,
    read_csv,
    run_args,
    served,
    start,
    station_command,
    wait_for_marker,
    wait_for_rows,
    write_sequence,
)

EXIT_STOPPED = 3


@pytest.mark.parametrize("signum", [signal.SIGINT, signal.SIGTERM])
def test_signal_mid_lot_leaves_the_bench_safe_and_whole_parts(tmp_path, signum):
    sequence = write_sequence(tmp_path)
    with served(tmp_path, parts=24) as (sim, bench):
        out = tmp_path / "lot"
        process = start(run_args(bench, sequence, out))
        wait_for_rows(out, 5, process)
        process.send_signal(signum)
        stdout, stderr = process.communicate(timeout=60)
        assert process.returncode == EXIT_STOPPED, stdout + stderr
        assert_bench_safe(sim)
    parts, _ = assert_whole_parts(out)
    assert 5 <= len(parts) < 24
    lot = json.loads((out / "lot.json").read_text())
    assert lot["complete"] is False and lot["stopped_because"]
    assert [line.split(":")[0] for line in lot["safe_state"]] == ["force", "supply", "switch"]
    assert all(line.endswith("ok") or "ok after" in line for line in lot["safe_state"])
    assert "safe state: force: level 0 V and output off" in stdout


def test_second_ctrl_c_during_the_safe_state_does_not_skip_it(tmp_path):
    sequence = write_sequence(tmp_path)
    with served(tmp_path, parts=24) as (sim, bench):
        out = tmp_path / "lot"
        process = start(run_args(bench, sequence, out))
        wait_for_rows(out, 4, process)
        sim.faults("supply").latency_s = 4.0   # 0.2 s per supply reply at speed 20: a slow ramp
        process.send_signal(signal.SIGINT)
        for _ in range(4):                     # keep pressing Ctrl-C while it ramps down
            time.sleep(0.35)
            if process.poll() is None:
                process.send_signal(signal.SIGINT)
        stdout, stderr = process.communicate(timeout=60)
        sim.faults("supply").latency_s = 0.0
        assert process.returncode == EXIT_STOPPED, stdout + stderr
        assert_bench_safe(sim)
    assert "safe state in progress" in stdout
    assert "Traceback" not in stderr
    assert_whole_parts(out)


def _dry_run(out, sequence, *extra):
    return station_command("dry-run", "--parts", "20", "--seed", "4", "--sites", "4", "--speed", "20",
                           "--sequence", str(sequence), "--lot", "K-1", *extra) + (
        ["--out", str(out)] if "--resume" not in extra else [])


def test_sigkill_then_resume_logs_every_part_once(tmp_path):
    sequence = write_sequence(tmp_path)
    out = tmp_path / "lot"
    process = start(_dry_run(out, sequence))
    wait_for_rows(out, 6, process)
    wait_for_marker(out)
    process.send_signal(signal.SIGKILL)
    process.communicate(timeout=30)
    before = read_csv(out / "parts.csv")
    interrupted = marker_ids(out)
    # Simulate the process dying inside a write as well: half a row at the end of each file.
    for name in ("parts.csv", "results.csv"):
        with open(out / name, "a", encoding="utf-8") as handle:
            handle.write("K-1,D00099,1,2,5")
    resumed = start(_dry_run(out, sequence, "--resume", str(out)))
    stdout, stderr = resumed.communicate(timeout=120)
    assert resumed.returncode == 0, stdout + stderr
    assert "dropped a torn last line" in stdout
    parts, _ = assert_whole_parts(out)
    truth = read_csv(out / "sim_truth.csv")
    finals = final_rows(parts)
    assert sorted(finals) == sorted(t["PART_ID"] for t in truth)
    assert len(parts) == len(truth)        # every part exactly once: the interrupted rows were dropped
    assert {p["PART_ID"] for p in parts if p["RETEST"] == "1"} == interrupted
    kept = [row for row in before if row["PART_ID"] not in interrupted]
    assert parts[:len(kept)] == kept                                      # earlier bins unchanged
    lot = json.loads((out / "lot.json").read_text())
    assert lot["complete"] is True and len(lot["resumed"]) == 1
    assert not (out / "in_progress.json").exists()


def test_run_resume_against_the_live_handler_retests_the_seated_parts(tmp_path):
    sequence = write_sequence(tmp_path)
    with served(tmp_path, parts=16) as (sim, bench):
        out = tmp_path / "lot"
        process = start(run_args(bench, sequence, out))
        wait_for_rows(out, 5, process)
        wait_for_marker(out)
        process.send_signal(signal.SIGKILL)
        process.communicate(timeout=30)
        interrupted = marker_ids(out)
        # The handler still holds the index that was under test; the station finds it there.
        resumed = start(station_command("run", "--bench", str(bench), "--sequence", str(sequence),
                                        "--limits", str(DEMO_LIMITS), "--resume", str(out)))
        stdout, stderr = resumed.communicate(timeout=120)
        assert resumed.returncode == 0, stdout + stderr
        assert_bench_safe(sim)
        truth_ids = [p.part_id for p in sim.truth()]
    parts, _ = assert_whole_parts(out)
    assert sorted(final_rows(parts)) == sorted(truth_ids) and len(parts) == len(truth_ids)
    assert {p["PART_ID"] for p in parts if p["RETEST"] == "1"} == interrupted


@pytest.mark.parametrize("second", [0.06, 0.17, "burst"])
def test_second_signal_after_the_first_keeps_exit_3_and_the_summary(tmp_path, second):
    # SIGTERM, then SIGINT 60-170 ms later (the trial that once died by SIGINT, or printed only
    # "stopped before the lot started"), or SIGINT every 50 ms through the whole way out.
    sequence = write_sequence(tmp_path)
    with served(tmp_path, parts=24) as (sim, bench):
        out = tmp_path / "lot"
        process = start(run_args(bench, sequence, out))
        wait_for_rows(out, 4, process)
        process.send_signal(signal.SIGTERM)
        if second == "burst":
            deadline = time.monotonic() + 4.0
            while process.poll() is None and time.monotonic() < deadline:
                time.sleep(0.05)
                if process.poll() is None:
                    process.send_signal(signal.SIGINT)
        else:
            time.sleep(second)
            if process.poll() is None:
                process.send_signal(signal.SIGINT)
        stdout, stderr = process.communicate(timeout=60)
        assert process.returncode == EXIT_STOPPED, stdout + stderr
        assert_bench_safe(sim)
    assert "stopped before the lot started" not in stdout
    assert "lot stopped: stopped by signal SIGTERM" in stdout, stdout[-2000:]
    assert "datalog:" in stdout and "Hard bins" in stdout
    assert "Traceback" not in stderr
    assert_whole_parts(out)

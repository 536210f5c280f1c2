"""Each injected fault kind during `station run`, through real sockets and a real subprocess.

The lot completes (or, when the fault persists, stops cleanly with exit 3 naming the
instrument and command, and a resume finishes it); no part ends in a DUT fail bin because
of a tester fault (compared with a fault-free run of the same simulated lot); and the
counts add up: parts.csv rows = parts presented + retest rows, every part has one final row.
"""

from __future__ import annotations

import json

import pytest

from sim_instruments.serve import apply_fault
from station.config.limit_tables import load_limit_table
from station.demo import DEMO_LIMITS
from tests.support.reliability_bench import (
    assert_bench_safe,
    assert_whole_parts,
    final_rows,
    run_args,
    served,
    start,
    station_command,
    wait_for_rows,
    write_sequence,
)

PARTS = 8
TIMEOUT_S = 0.3           # wall seconds; the sim at speed 20 answers within milliseconds
TABLE = load_limit_table(DEMO_LIMITS)
FAULT_BIN = TABLE.tester_fault_hard_bin


@pytest.fixture(scope="module")
def reference(tmp_path_factory) -> dict[str, str]:
    """Hard bin of every part in a fault-free run of the same lot."""
    tmp = tmp_path_factory.mktemp("reference")
    sequence = write_sequence(tmp)
    with served(tmp, parts=PARTS, timeout_s=TIMEOUT_S) as (_, bench):
        process = start(run_args(bench, sequence, tmp / "lot"))
        stdout, stderr = process.communicate(timeout=120)
        assert process.returncode == 0, stdout + stderr
    parts, _ = assert_whole_parts(tmp / "lot")
    assert len(parts) == PARTS
    return {pid: row["HARD_BIN"] for pid, row in final_rows(parts).items()}


def _check_lot(out, reference: dict[str, str]) -> list[dict[str, str]]:
    parts, _ = assert_whole_parts(out)
    finals = final_rows(parts)
    assert sorted(finals) == sorted(reference)                              # nothing lost
    assert len(parts) == len(reference) + sum(p["RETEST"] == "1" for p in parts)
    for pid, row in finals.items():
        assert int(row["HARD_BIN"]) != FAULT_BIN, f"{pid} left in the tester-fault bin"
        if not TABLE.hard_bins[int(row["HARD_BIN"])].passing:
            # A DUT fail only where the fault-free run fails the part too.
            assert not TABLE.hard_bins[int(reference[pid])].passing, f"{pid} failed because of a fault"
    for row in parts:                      # a tester-fault row is never a pass/fail judgement
        if row["FAULT"]:
            assert row["HARD_BIN"] == str(FAULT_BIN) and row["PASS"] == ""
    return parts


# Each fault kind, on instruments of each kind of job: [(role, kind, value), ...] per run.
# (A timeout that the link's retries absorb is in test_reliability_retry.py.)
FAULTS = {
    "latency": [("dmm2", "latency", 0.5)],      # slower replies, within the timeout: no retry
    "timeout": [("dmm1", "timeout", 6)],        # outlasts the retries: the index is retested
    "drop": [("force", "drop", 3)],             # reconnect, the setting sent again whole
    "garbage": [("supply", "garbage", 2)],      # asked again
    "error": [("switch", "error", -222)],       # found at the end of the index: retested
    "handler": [("handler", "timeout", 1), ("handler", "garbage", 2)],  # NEXT? lost: ask what is seated
}
INDEX_FAULTS = {"timeout", "error"}            # these make a tester-fault row before the retest


@pytest.mark.parametrize("name", list(FAULTS))
def test_fault_mid_lot(tmp_path, reference, name):
    sequence = write_sequence(tmp_path)
    with served(tmp_path, parts=PARTS, timeout_s=TIMEOUT_S) as (sim, bench):
        out = tmp_path / "lot"
        process = start(run_args(bench, sequence, out))
        wait_for_rows(out, 4, process)
        for role, kind, value in FAULTS[name]:
            apply_fault(sim, role, kind, value)
        stdout, stderr = process.communicate(timeout=120)
        assert process.returncode == 0, stdout + stderr
        assert_bench_safe(sim)
    parts = _check_lot(out, reference)
    faulted = [p for p in parts if p["FAULT"]]
    if name in INDEX_FAULTS:
        role = FAULTS[name][0][0]
        assert faulted and all(p["FAULT"].startswith(f"{role} (") for p in faulted)
        assert {p["PART_ID"] for p in faulted} <= {p["PART_ID"] for p in parts if p["RETEST"] == "1"}
    lot = json.loads((out / "lot.json").read_text())
    assert lot["complete"] is True and lot["parts_tested"] == len(parts)


def test_persistent_fault_stops_cleanly_then_resume_finishes(tmp_path, reference):
    sequence = write_sequence(tmp_path)
    with served(tmp_path, parts=PARTS, timeout_s=TIMEOUT_S) as (sim, bench):
        out = tmp_path / "lot"
        process = start(run_args(bench, sequence, out, "REL-1", "--max-faults", "2"))
        wait_for_rows(out, 4, process)
        sim.faults("dmm1").timeout_next = 10_000           # dmm1 stops answering
        stdout, stderr = process.communicate(timeout=120)
        assert process.returncode == 3, stdout + stderr
        stop = next(line for line in stdout.splitlines() if line.startswith("lot stopped"))
        assert "--max-faults 2)" in stop
        assert "last: dmm1 (" in stop and "command '" in stop
        assert_bench_safe(sim)                              # the other instruments went safe
        lot = json.loads((out / "lot.json").read_text())
        assert lot["complete"] is False and "dmm1" in lot["stopped_because"]
        assert_whole_parts(out)
        sim.faults("dmm1").clear()                          # the operator fixes the cable
        resumed = start(station_command("run", "--bench", str(bench), "--sequence", str(sequence),
                                        "--limits", str(DEMO_LIMITS), "--resume", str(out)))
        stdout, stderr = resumed.communicate(timeout=120)
        assert resumed.returncode == 0, stdout + stderr
        assert_bench_safe(sim)
    _check_lot(out, reference)

"""The live page's snapshot, computed from a datalog folder alone: counts, states, alarms, and
following parts.csv as it grows."""

from __future__ import annotations

import csv
import json
from collections import Counter
from pathlib import Path

import numpy as np
import pytest
from scipy import stats

from station.datalog.folder import DatalogError
from station.view.alarms import read_alarms
from station.view.follow import PartsFollower
from station.view.snapshot import LotSnapshots, Phase, recent_rate
from tests.support.review_datalogs import LotSpec, make_datalog


def rows_of(folder: Path) -> list[dict[str, str]]:
    with open(folder / "parts.csv", newline="") as handle:
        return list(csv.DictReader(handle))


def running(folder: Path, **extra: object) -> dict:
    """Make the folder's lot look unfinished (as lot.json is while a lot runs), plus `extra`."""
    lot = json.loads((folder / "lot.json").read_text())
    for key in ("end_t", "end_time", "hard_bins", "soft_bins", "parts_tested"):
        lot.pop(key, None)
    lot["complete"] = False
    lot.update(extra)
    (folder / "lot.json").write_text(json.dumps(lot))
    return lot


def test_counts_equal_a_plain_count_of_parts_csv(tmp_path: Path) -> None:
    folder = make_datalog(tmp_path / "lot", LotSpec(parts=120, tester_faults=3, opens=2, shorts=1, retests=4))
    snap = LotSnapshots(folder).compute()
    rows = rows_of(folder)
    # Counted here with csv and Counter, independently of the station's code.
    hard = Counter(int(r["HARD_BIN"]) for r in rows)
    assert {b["bin"]: b["count"] for b in snap["hard_bins"] if b["count"]} == dict(hard)
    assert snap["totals"]["tested"] == len(rows) == 124
    assert snap["totals"]["good"] == sum(r["PASS"] == "1" for r in rows)
    assert snap["totals"]["failed"] == sum(r["PASS"] == "0" for r in rows)
    assert snap["totals"]["tester_faults"] == sum(r["PASS"] == "" for r in rows) == 3
    grades = Counter(r["GRADE"] for r in rows if r["PASS"] == "1")
    decided = sum(r["PASS"] != "" for r in rows)
    for g in snap["grades"]:
        assert g["parts"] == grades.get(g["grade"], 0)
        assert g["share"] == pytest.approx(grades.get(g["grade"], 0) / decided)
    per_site = Counter(int(r["SITE_NUM"]) for r in rows)
    assert {s["site"]: s["tested"] for s in snap["sites"]["rows"]} == dict(per_site)
    # Every hard bin of the table is shown, the empty ones too.
    assert {b["bin"] for b in snap["hard_bins"]} >= {1, 2, 5, 6, 9}
    assert snap["state"]["key"] == "safe" and snap["progress"]["ended"]


def test_a_site_that_differs_is_flagged_with_its_p(tmp_path: Path) -> None:
    folder = make_datalog(tmp_path / "lot", LotSpec(parts=200, bad_site=3, tester_faults=0, opens=0,
                                                    shorts=0, retests=0))
    snap = LotSnapshots(folder).compute()
    sites = {s["site"]: s for s in snap["sites"]["rows"]}
    assert sites[3]["differs"] and not any(sites[s]["differs"] for s in (1, 2, 4))
    assert snap["sites"]["flagged"] and "p =" in snap["sites"]["test"]
    # Site 3 against the others pooled: Fisher's exact test straight from scipy.
    rest_good = sum(sites[s]["good"] for s in (1, 2, 4))
    rest_failed = sum(sites[s]["failed"] for s in (1, 2, 4))
    p = stats.fisher_exact([[sites[3]["good"], sites[3]["failed"]], [rest_good, rest_failed]]).pvalue
    assert sites[3]["p_vs_rest"] == pytest.approx(p)


def test_last_failing_parts_name_their_failing_test(tmp_path: Path) -> None:
    folder = make_datalog(tmp_path / "lot", LotSpec(parts=80, tester_faults=2, opens=2, shorts=0, retests=0))
    lot = json.loads((folder / "lot.json").read_text())
    lot["tests"] = [{"test_num": 1001, "test_txt": "Iq contact check"}]
    (folder / "lot.json").write_text(json.dumps(lot))
    snap = LotSnapshots(folder).compute()
    failing = [r for r in rows_of(folder) if r["PASS"] != "1"][::-1][:8]
    assert [f["part_id"] for f in snap["last_failing"]] == [r["PART_ID"] for r in failing]
    for shown, row in zip(snap["last_failing"], failing, strict=True):
        if row["PASS"] == "":
            assert shown["fault"] and shown["what"] == "tester fault: dmm1: timeout"
        elif row["FAIL_TEST"] == "1001":
            assert shown["what"] == "1001 Iq contact check"
        else:
            assert shown["what"].startswith(row["FAIL_TEST"])


def test_follows_parts_csv_as_it_grows_and_ignores_a_torn_line(tmp_path: Path) -> None:
    source = make_datalog(tmp_path / "src", LotSpec(parts=40, retests=0))
    folder = make_datalog(tmp_path / "lot", LotSpec(parts=40, retests=0))
    running(folder)
    lines = (source / "parts.csv").read_text().splitlines(keepends=True)
    (folder / "parts.csv").write_text("".join(lines[:1]))
    snaps = LotSnapshots(folder)
    assert snaps.compute()["totals"]["tested"] == 0
    assert snaps.compute()["state"]["key"] == "testing"
    with open(folder / "parts.csv", "a") as handle:
        handle.write("".join(lines[1:11]) + lines[11][:20])      # ten rows and a torn one
    assert snaps.compute()["totals"]["tested"] == 10
    with open(folder / "parts.csv", "a") as handle:
        handle.write(lines[11][20:] + "".join(lines[12:21]))
    snap = snaps.compute()
    assert snap["totals"]["tested"] == 20
    hard = Counter(int(line.split(",")[4]) for line in lines[1:21])
    assert {b["bin"]: b["count"] for b in snap["hard_bins"] if b["count"]} == dict(hard)
    # A resumed lot cuts the file back to whole parts: read again from its start.
    (folder / "parts.csv").write_text("".join(lines[:6]))
    assert snaps.compute()["totals"]["tested"] == 5


def test_a_damaged_row_is_a_problem_on_the_page_not_a_crash(tmp_path: Path) -> None:
    folder = make_datalog(tmp_path / "lot", LotSpec(parts=12, retests=0))
    with open(folder / "parts.csv", "a") as handle:
        handle.write("LOT-T1,P99999,1,x,1,1,A,1,800,0,,,1.0\n")
    follower = PartsFollower(folder / "parts.csv")
    with pytest.raises(DatalogError, match=r"parts.csv:14: SITE_NUM"):
        follower.poll()
    assert follower.rows == []        # all of a read or nothing
    snap = LotSnapshots(folder).compute()
    assert any("SITE_NUM" in p for p in snap["problems"])


def test_states_from_the_folder(tmp_path: Path) -> None:
    folder = make_datalog(tmp_path / "lot", LotSpec(parts=12, tester_faults=0, opens=0, shorts=0, retests=0))
    snaps = LotSnapshots(folder, phase=Phase())
    assert snaps.compute()["state"]["key"] == "safe"
    lot = running(folder)
    now = lot["start_t"] + 60
    assert snaps.compute(now)["state"]["key"] == "testing"
    assert snaps.compute(now + 3600)["state"]["key"] == "quiet"      # an hour with no new part
    snaps.phase.value = "safe state"
    assert snaps.compute(now)["state"]["label"] == "SAFE STATE"
    snaps.phase.value = None
    running(folder, paused=True)
    assert snaps.compute(now)["state"]["label"] == "PAUSED"
    running(folder, paused=False)
    with open(folder / "parts.csv", "a") as handle:
        handle.write(f"LOT-T1,P00013,1,1,9,99,,,812,0,,dmm2: timeout,{now}\n")
    state = snaps.compute(now)["state"]
    assert state["label"] == "TESTER FAULT" and "dmm2: timeout" in state["detail"]
    running(folder, end_t=now, stopped_because="interrupted by Ctrl-C",
            safe_state_unverified=["supply: outputs off: FAILED"])
    state = snaps.compute(now)["state"]
    assert state["label"] == "STOPPED" and "Ctrl-C" in state["detail"] and "NOT confirmed safe" in state["detail"]


def test_alarms_by_the_lot_control_contract(tmp_path: Path) -> None:
    folder = make_datalog(tmp_path / "lot", LotSpec(parts=12, retests=0))
    alarm = {"rule": "site yield", "action": "pause", "site": 2, "message": "site 2 yield 40 % over the last 10",
             "parts": ["P00002", "P00006", "NOT-LOGGED"], "time": "2026-12-01T18:05:00Z"}
    running(folder, paused=True, alarms=[alarm])
    snap = LotSnapshots(folder).compute()
    assert snap["paused"] is True
    (shown,) = snap["alarms"]
    assert {k: shown[k] for k in alarm} == alarm
    rows = {r["PART_ID"]: r for r in rows_of(folder)}
    first = shown["evidence"][0]
    assert first["part_id"] == "P00002" and first["hard_bin"] == int(rows["P00002"]["HARD_BIN"])
    assert shown["evidence"][2] == {"part_id": "NOT-LOGGED", "site": None, "hard_bin": None, "soft_bin": None}
    # Entries that break the contract are named, never silently dropped: lot.json's shared
    # shape check (station/datalog/header.py) refuses them and the page says which entry.
    running(folder, paused=True, alarms=[alarm, {"action": "warn"}, "nonsense"])
    broken = LotSnapshots(folder).compute()
    assert any("alarms.1.rule" in p and "lot.json" in p for p in broken["problems"]), broken["problems"]
    assert read_alarms({}) == ([], [])
    assert read_alarms({"alarms": 5})[1] == ["lot.json: alarms: expected a list, got int"]


def test_waiting_before_the_lot_starts_and_the_remaining_time(tmp_path: Path) -> None:
    assert LotSnapshots(tmp_path).compute()["state"]["key"] == "waiting"
    # 4 sites, an index every 2 s, its rows logged a few ms apart: the rows after the first
    # index over the time from its end to the last one's.
    ends = np.array([100.0, 100.01, 100.02, 100.03, 102.0, 102.01, 102.02, 102.03, 104.0, 104.01])
    sites = np.array([1, 2, 3, 4, 1, 2, 3, 4, 1, 2])
    assert recent_rate(ends, sites) == pytest.approx(3600.0 * 6 / (104.01 - 100.03))
    assert recent_rate(ends[:4], sites[:4]) is None          # one index: no rate yet
    folder = make_datalog(tmp_path / "lot", LotSpec(parts=40, tester_faults=0, opens=0, shorts=0, retests=0))
    lot = running(folder)
    progress = LotSnapshots(folder, expected_parts=100).compute(lot["start_t"] + 20.0)["progress"]
    rate = 3600.0 * 36 / (2.0 * 9)          # 40 parts, one index of 4 every 2 s
    assert progress["parts_per_hour"] == pytest.approx(rate)
    assert progress["remaining_s"] == pytest.approx(60 / rate * 3600.0)

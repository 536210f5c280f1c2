"""What a resume keeps of a datalog folder, on files made by the datalog writer (no bench):
torn last lines, the in_progress marker's rows, result rows without their part row, and the
checks that refuse a folder."""

from __future__ import annotations

import csv
import json

import pytest

from station.config.test_catalog import TestDef
from station.datalog.resume import ResumeRefused, inspect_resume
from station.datalog.writer import DatalogWriter, PartRecord, ResultRow
from station.demo import DEMO_LIMITS, DEMO_SEQUENCE

VOS = TestDef(2001, "Vos at nominal supply", "vos", None, 0.0)


def _lot(folder, parts: int):
    writer = DatalogWriter(folder)
    writer.start({"lot_id": "R-1", "mode": "run"},
                 {"sequence": DEMO_SEQUENCE, "limits": DEMO_LIMITS, "bench": DEMO_LIMITS})
    for k in range(1, parts + 1):
        writer.write_part(PartRecord(f"P{k}", 1, 1, 1, "A", True, 10), [ResultRow(VOS, 1e-6 * k)])
    return writer


def _inspect(folder):
    return inspect_resume(folder, mode="run", sequence=DEMO_SEQUENCE, limits=DEMO_LIMITS)


def _ids(path):
    with open(path, newline="") as handle:
        return [row["PART_ID"] for row in csv.DictReader(handle)]


def test_marker_rows_are_dropped_and_its_parts_retested(tmp_path):
    writer = _lot(tmp_path, 3)
    writer.mark_in_progress(["P4", "P5"], presented_before=3)
    writer.write_part(PartRecord("P4", 1, 1, 1, "A", True, 10), [ResultRow(VOS, 4e-6)])  # then killed
    state = _inspect(tmp_path)
    assert state.interrupted == ["P4", "P5"] and state.presented_before == 3
    assert state.done_ids == {"P1", "P2", "P3"}
    assert "P4" in state.seen_ids                  # its retest will carry RETEST=1
    state.apply()
    assert _ids(tmp_path / "parts.csv") == ["P1", "P2", "P3"]
    assert _ids(tmp_path / "results.csv") == ["P1", "P2", "P3"]


def test_torn_lines_and_orphan_results_are_dropped(tmp_path):
    _lot(tmp_path, 2)
    with open(tmp_path / "results.csv", "a", newline="") as handle:   # P3's results, no part row
        csv.writer(handle).writerow(["R-1", "P3", 1, 1, 2001, "Vos", "vos", "", 0.0, "", 3e-6, "V",
                                     "", "", "", "", "", ""])
        handle.write("R-1,P3,1,1,20")                                   # and half a row
    with open(tmp_path / "parts.csv", "a") as handle:
        handle.write("R-1,P3,1,1,1,1,A")
    state = _inspect(tmp_path)
    assert any("torn" in w and "parts.csv" in w for w in state.warnings)
    assert any("no parts.csv row" in w and "P3" in w for w in state.warnings)
    assert state.done_ids == {"P1", "P2"} and "P3" in state.interrupted
    state.apply()
    assert _ids(tmp_path / "results.csv") == ["P1", "P2"]
    assert (tmp_path / "parts.csv").read_text().endswith("\n")


def test_refusals(tmp_path):
    _lot(tmp_path, 1)
    with pytest.raises(ResumeRefused, match="sequence file this lot started with"):
        inspect_resume(tmp_path, mode="run", sequence=DEMO_LIMITS, limits=DEMO_LIMITS)
    with pytest.raises(ResumeRefused, match="limits file this lot started with"):
        inspect_resume(tmp_path, mode="run", sequence=DEMO_SEQUENCE, limits=DEMO_SEQUENCE)
    with pytest.raises(ResumeRefused, match="dry-run --resume|station run --resume"):
        inspect_resume(tmp_path, mode="dry-run", sequence=DEMO_SEQUENCE, limits=DEMO_LIMITS)
    with open(tmp_path / "parts.csv", "a") as handle:          # a damaged row in the middle
        handle.write("x,y\nR-1,P9,1,1,1,1,A,1,10,0,,,1.0\n")
    with pytest.raises(ResumeRefused, match="damaged"):
        _inspect(tmp_path)
    header = json.loads((tmp_path / "lot.json").read_text())
    (tmp_path / "lot.json").write_text(json.dumps({**header, "complete": True}))
    (tmp_path / "manifest.json").write_text("{}")               # ended and sealed
    with pytest.raises(ResumeRefused, match="ran to its end"):
        _inspect(tmp_path)

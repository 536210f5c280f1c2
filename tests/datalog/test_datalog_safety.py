"""The datalog's safety guarantees on files made by the datalog writer (no bench): the lot end
is a restartable commit, no datalog file is overwritten without --force, resume refuses rows
that do not fit the format, and a part row on disk always means its results are there."""

from __future__ import annotations

import csv
import gc
import json
import os
from pathlib import Path

import pytest

from station.config.test_catalog import TestDef
from station.datalog.folder import DatalogError
from station.datalog.manifest import verify_datalog
from station.datalog.resume import inspect_resume
from station.datalog.writer import DatalogWriter, PartRecord, ResultRow
from station.demo import DEMO_LIMITS, DEMO_SEQUENCE

VOS = TestDef(2001, "Vos at nominal supply", "vos", None, 0.0)
IQ = TestDef(6001, "Iq", "iq", None, 0.0)


def _lot(folder: Path, parts: int) -> DatalogWriter:
    writer = DatalogWriter(folder)
    writer.start({"lot_id": "S-1", "mode": "run"},
                 {"sequence": DEMO_SEQUENCE, "limits": DEMO_LIMITS, "bench": DEMO_LIMITS})
    for k in range(1, parts + 1):
        writer.write_part(PartRecord(f"P{k}", 1, 1, 1, "A", True, 10),
                          [ResultRow(VOS, 1e-6 * k), ResultRow(IQ, 4e-4)])
    return writer


def _ids(path: Path) -> list[str]:
    with open(path, newline="") as handle:
        return [row["PART_ID"] for row in csv.DictReader(handle)]


def _inspect(folder: Path):
    return inspect_resume(folder, mode="run", sequence=DEMO_SEQUENCE, limits=DEMO_LIMITS)


def test_a_lot_killed_between_its_end_and_the_manifest_can_be_resumed_to_its_seal(tmp_path: Path) -> None:
    # Safety issue 2: lot.json complete, no manifest.json (killed in between): resume used to
    # refuse it ("ran to its end") and verify failed, so no command could seal it.
    _lot(tmp_path, 2).finish({"complete": True, "stopped_because": ""})
    assert not (tmp_path / "manifest.json").exists()
    state = _inspect(tmp_path)
    assert state.ended and state.done_ids == {"P1", "P2"}
    from station.datalog.seal import seal_datalog

    seal_datalog(tmp_path, stdf=True)
    report = verify_datalog(tmp_path)
    assert report.intact, report.messages()
    assert (tmp_path / "lot.stdf").is_file()
    with pytest.raises(DatalogError, match="ran to its end"):  # sealed now: nothing to resume
        _inspect(tmp_path)


def test_csv_files_without_lot_json_are_not_overwritten_without_force(tmp_path: Path) -> None:
    # Safety issue 6: --out on a folder with results.csv and parts.csv but no lot.json
    # overwrote both without --force.
    (tmp_path / "results.csv").write_text("keep me\n")
    (tmp_path / "parts.csv").write_text("and me\n")
    with pytest.raises(DatalogError, match="--force"):
        DatalogWriter(tmp_path)
    assert (tmp_path / "results.csv").read_text() == "keep me\n"
    assert (tmp_path / "parts.csv").read_text() == "and me\n"
    DatalogWriter(tmp_path, force=True)   # --force may


def test_resume_refuses_a_row_that_does_not_fit_the_format(tmp_path: Path) -> None:
    # Safety issue 10: a results row with RESULT=abc was kept and sealed by --resume.
    _lot(tmp_path, 2)
    lines = (tmp_path / "results.csv").read_text().splitlines(keepends=True)
    assert ",0.0004," in lines[2]                   # line 3: P1's Iq
    lines[2] = lines[2].replace(",0.0004,", ",abc,")
    (tmp_path / "results.csv").write_text("".join(lines))
    with pytest.raises(DatalogError, match=r"results\.csv:3: RESULT: 'abc' is not a number"):
        _inspect(tmp_path)


def test_a_full_disk_never_leaves_a_part_row_without_its_results(tmp_path: Path) -> None:
    # Safety issue 12: the results write fails (ENOSPC, as /dev/full gives); the part row was
    # still buffered and reached the disk later (at finish or at exit) without its results.
    writer = _lot(tmp_path, 1)
    full = os.open("/dev/full", os.O_WRONLY)
    try:
        os.dup2(full, writer._results.fileno())
        with pytest.raises(OSError):
            writer.write_part(PartRecord("P2", 1, 1, 1, "A", True, 10),
                              [ResultRow(VOS, 2e-6), ResultRow(IQ, 4e-4)])
        try:
            writer.finish({"stopped_because": "station error"})
        except OSError:
            pass
        del writer
        gc.collect()                       # the process exits: buffers are flushed
    finally:
        os.close(full)
    assert _ids(tmp_path / "parts.csv") == ["P1"]
    assert _ids(tmp_path / "results.csv") == ["P1", "P1"]
    state = _inspect(tmp_path)
    assert state.done_ids == {"P1"}


def test_results_without_their_part_row_are_the_part_in_progress(tmp_path: Path) -> None:
    _lot(tmp_path, 2)
    with open(tmp_path / "results.csv", "a", newline="") as handle:   # P3 killed before its part row
        csv.writer(handle).writerow(["S-1", "P3", 1, 1, 2001, "Vos", "vos", "", 0.0, "", 3e-6, "V",
                                     "", "", "", "", "", ""])
    state = _inspect(tmp_path)
    assert "P3" in state.interrupted and state.done_ids == {"P1", "P2"}


def test_results_of_no_part_in_the_middle_refuse_the_resume(tmp_path: Path) -> None:
    _lot(tmp_path, 2)
    text = (tmp_path / "results.csv").read_text().splitlines(keepends=True)
    stray = "S-1,Q9,1,1,2001,Vos,vos,,0.0,,3e-06,V,,,,,,\n"
    (tmp_path / "results.csv").write_text("".join([text[0], text[1], stray, *text[2:]]))
    with pytest.raises(DatalogError, match=r"results\.csv:3: .*Q9"):
        _inspect(tmp_path)


def test_lot_json_records_complete_only_after_the_csv_files_are_closed(tmp_path: Path) -> None:
    writer = _lot(tmp_path, 1)
    writer.finish({"complete": True})
    assert json.loads((tmp_path / "lot.json").read_text())["complete"] is True
    assert not list(tmp_path.glob("*.partial"))

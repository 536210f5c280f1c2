"""Writing one lot run into its datalog folder: results.csv, parts.csv, lot.json and copies of
the applied files. The format (columns, names, durable writes) is station/datalog/folder.py;
for users, docs/datalog-format.md.

A part is committed in two steps: its result rows are appended and fsync'ed, then its part
row is appended and fsync'ed. The part row is the commit record: a part row on disk always
means its results are there; results with no part row after them are the part that was in
progress (resume drops and retests it). The CSV files are written unbuffered, so after a
failed write (a full disk) nothing is left in a buffer to reach the disk later, and the
writer refuses any further part. lot.json is written at lot start (complete: false) and
rewritten at lot end. Before each handler index a marker (in_progress.json) names the parts
under test and how many rows the CSV files held (station/datalog/resume.py).
"""

from __future__ import annotations

import json
import os
import time
from dataclasses import dataclass
from datetime import UTC, datetime
from pathlib import Path
from typing import TYPE_CHECKING, Any

from station.config.test_catalog import TestDef
from station.datalog.folder import (
    DATALOG_FILES,
    END_OF_LOT_FILES,
    FORMAT,
    HEAD_NUM,
    LOT_JSON,
    MARKER,
    PART_COLUMNS,
    PARTS_CSV,
    RESULT_COLUMNS,
    RESULTS_CSV,
    DatalogError,
    append_durably,
    csv_text,
    fsync_dir,
    sha256_of,
    write_atomically,
)

if TYPE_CHECKING:
    from io import FileIO

    from station.datalog.resume import ResumeState

__all__ = ["FORMAT", "MARKER", "PART_COLUMNS", "RESULT_COLUMNS", "DatalogError", "DatalogWriter",
           "PartRecord", "ResultRow", "check_writable", "iso_utc", "sha256_of"]


@dataclass(frozen=True)
class ResultRow:
    test: TestDef
    value: float
    low: float | None = None
    high: float | None = None
    passed: bool | None = None
    grade: str | None = None
    pat_low: float | None = None     # the PAT window the part was screened with (PAT_LO/PAT_HI)
    pat_high: float | None = None


@dataclass(frozen=True)
class PartRecord:
    part_id: str
    site: int
    hard_bin: int
    soft_bin: int
    grade: str | None
    passed: bool | None          # None: tester fault, no pass/fail indication
    test_t_ms: int
    retest: bool = False
    fail_test: int | None = None
    fault: str = ""
    end_t: float = 0.0


def iso_utc(t: float) -> str:
    return datetime.fromtimestamp(t, UTC).strftime("%Y-%m-%dT%H:%M:%SZ")


def _cell(value: Any) -> str:
    if value is None:
        return ""
    if isinstance(value, bool):
        return "1" if value else "0"
    if isinstance(value, float):
        return repr(value)  # shortest exact text; 'inf' for over-range
    return str(value)


def check_writable(folder: Path) -> None:
    """Refuse a datalog folder that cannot be created or written, before anything is powered."""
    probe = Path(folder)
    while not probe.exists():
        if probe.parent == probe:
            break
        probe = probe.parent
    if probe.exists() and not probe.is_dir():
        raise DatalogError(f"cannot write the datalog here: {probe} is a file, not a folder",
                           path=folder, hint="choose another --out")
    if not os.access(probe, os.W_OK | os.X_OK):
        raise DatalogError(f"cannot write the datalog here: {probe} is not writable", path=folder,
                           hint="choose another --out")


class DatalogWriter:
    """Writes one lot run into `folder`; refuses a folder holding any datalog file unless `force`."""

    def __init__(self, folder: Path, *, force: bool = False, resume: ResumeState | None = None) -> None:
        self.folder = Path(folder)
        self.resume = resume            # a ResumeState: continue that lot here
        if self.folder.exists() and not self.folder.is_dir():
            raise DatalogError("exists and is not a folder", path=self.folder, hint="choose another --out")
        if resume is None and not force:
            present = [name for name in DATALOG_FILES if (self.folder / name).exists()]
            if present:
                what = "already holds a datalog" if LOT_JSON in present else \
                    f"already holds datalog files ({', '.join(present)})"
                raise DatalogError(what, path=self.folder, hint="choose another --out, pass --resume to "
                                   "continue the lot, or --force to overwrite it")
        check_writable(self.folder)
        self.header: dict[str, Any] = {}
        self._results: FileIO | None = None
        self._parts: FileIO | None = None
        self._broken: str = ""          # why no more parts can be written (a failed write)
        self.part_rows = 0              # data rows in parts.csv / results.csv, for the marker
        self.result_rows = 0

    def start(self, header: dict[str, Any], copies: dict[str, Path]) -> None:
        """Create the folder, copy the applied files (`copies`: key -> source) and write lot.json.

        When resuming, the folder's CSV files are first cut back to whole parts (see
        station/datalog/resume.py) and then appended to; lot.json keeps its header and gains
        a resume time.
        """
        if self.resume is not None:
            self._start_resumed(header)
            return
        try:
            self.folder.mkdir(parents=True, exist_ok=True)
            for name in DATALOG_FILES:
                (self.folder / name).unlink(missing_ok=True)
            self.header = {"format": FORMAT, **header}
            for key, source in copies.items():
                target = self.folder / f"{key}.yaml"
                write_atomically(target, Path(source).read_bytes())
                self.header[key] = {"file": target.name, "source": str(Path(source).resolve()),
                                    "sha256": sha256_of(target)}
            self.header.setdefault("start_t", time.time())
            self.header["start_time"] = iso_utc(self.header["start_t"])
            self.header["complete"] = False
            write_atomically(self.folder / RESULTS_CSV, csv_text([], RESULT_COLUMNS))
            write_atomically(self.folder / PARTS_CSV, csv_text([], PART_COLUMNS))
            self.write_header()
            self._open_for_append()
        except OSError as exc:
            raise DatalogError(f"cannot write the datalog: {exc}", path=self.folder) from None

    def _start_resumed(self, header: dict[str, Any]) -> None:
        state = self.resume
        assert state is not None
        try:
            state.apply()               # whole parts only, marker rows dropped
            for name in END_OF_LOT_FILES:
                (self.folder / name).unlink(missing_ok=True)
            self.header = dict(state.header)
            if self.header.get("format") != FORMAT:     # state.apply() rewrote the CSV files in it
                self.header["format_upgraded"] = {"from": self.header.get("format"), "time": iso_utc(time.time())}
                self.header["format"] = FORMAT
            self.header["instruments"] = header.get("instruments", self.header.get("instruments"))
            now = time.time()
            self.header["resumed"] = [*self.header.get("resumed", []), iso_utc(now)]
            self.header["complete"] = False
            for key in ("end_t", "end_time", "stopped_because", "safe_state", "pause"):
                self.header.pop(key, None)
            self.header["paused"] = False      # a lot killed at a pause: nobody waits for that answer
            self.write_header()
            self._open_for_append()
        except OSError as exc:
            raise DatalogError(f"cannot write the datalog: {exc}", path=self.folder) from None
        self.part_rows = len(state.part_rows)
        self.result_rows = len(state.result_rows)

    def _open_for_append(self) -> None:
        # Unbuffered: every byte given to the OS at once, nothing kept back for later.
        self._results = open(self.folder / RESULTS_CSV, "ab", buffering=0)
        self._parts = open(self.folder / PARTS_CSV, "ab", buffering=0)

    def mark_in_progress(self, ids: list[str], presented_before: int) -> None:
        """Before an index: which parts are under test, and the row counts to go back to."""
        marker = {"lot_id": self.header.get("lot_id"), "ids": ids, "presented_before": presented_before,
                  "parts_rows": self.part_rows, "results_rows": self.result_rows, "t": time.time()}
        write_atomically(self.folder / MARKER, json.dumps(marker) + "\n")

    def clear_in_progress(self) -> None:
        """After an index is logged: nothing in progress."""
        (self.folder / MARKER).unlink(missing_ok=True)
        fsync_dir(self.folder)

    def write_header(self) -> None:
        """(Re)write lot.json atomically: a crash leaves the old or the new one, never half."""
        write_atomically(self.folder / LOT_JSON, json.dumps(self.header, indent=2) + "\n")

    def write_part(self, part: PartRecord, rows: list[ResultRow]) -> None:
        """Commit one part: its results, then its part row (the commit record), each fsync'ed."""
        self.write_parts([(part, rows)])

    def write_parts(self, parts: list[tuple[PartRecord, list[ResultRow]]]) -> None:
        """Commit the parts of one handler index together: all their results, fsync'ed, then
        all their part rows (the commit records), fsync'ed. Two syncs per index instead of two
        per part; a part row is still never durable before its results, and every part is
        durable when this returns (before the handler sorts it)."""
        if self._broken:
            raise OSError(f"the datalog takes no more parts after a failed write ({self._broken})")
        assert self._results is not None and self._parts is not None, "start() first"
        if not parts:
            return
        lot = self.header["lot_id"]
        results = csv_text([[_cell(v) for v in (
            lot, part.part_id, HEAD_NUM, part.site, row.test.test_num, row.test.test_txt, row.test.param,
            row.test.region or "", row.test.vcm, row.test.cond, float(row.value), row.test.units, row.low,
            row.high, row.passed, row.grade, row.pat_low, row.pat_high)] for part, rows in parts for row in rows])
        part_rows = csv_text([[_cell(v) for v in (   # RESCREEN stays empty until the lot end (seal)
            lot, part.part_id, HEAD_NUM, part.site, part.hard_bin, part.soft_bin, part.grade, part.passed,
            part.test_t_ms, part.retest, part.fail_test, part.fault, round(part.end_t, 3), None)]
            for part, _ in parts])
        try:
            if results:
                append_durably(self._results.fileno(), results.encode("utf-8"))
            append_durably(self._parts.fileno(), part_rows.encode("utf-8"))
        except OSError as exc:
            self._broken = f"{exc.strerror or exc}"
            raise
        self.result_rows += sum(len(rows) for _, rows in parts)
        self.part_rows += len(parts)

    def finish(self, updates: dict[str, Any]) -> None:
        """Close the CSV files and rewrite lot.json with the end-of-lot figures."""
        for handle in (self._results, self._parts):
            if handle is not None and not handle.closed:
                handle.close()          # unbuffered: nothing left to write
        self.header.update(updates)
        self.header.setdefault("end_t", time.time())
        self.header["end_time"] = iso_utc(self.header["end_t"])
        self.write_header()

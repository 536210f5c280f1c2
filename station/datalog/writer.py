"""The datalog folder: results.csv, parts.csv, lot.json and copies of the applied files.

Rows of a part are appended when the part ends, then flushed and fsync'ed, so a crash loses
at most the parts in progress. lot.json is written at lot start (complete: false) and
rewritten at lot end. Before each handler index a small marker (in_progress.json) names the
parts under test and how many rows the CSV files held, so a resumed lot knows what to drop
and retest (station/datalog/resume.py). The format is described in docs/datalog-format.md.
"""

from __future__ import annotations

import csv
import hashlib
import json
import os
import shutil
import time
from dataclasses import dataclass
from datetime import UTC, datetime
from pathlib import Path
from typing import Any

from station.config.test_catalog import TestDef

FORMAT = "ampscreen-datalog/1"
RESULT_COLUMNS = ["LOT_ID", "PART_ID", "HEAD_NUM", "SITE_NUM", "TEST_NUM", "TEST_TXT", "PARAM", "REGION",
                  "VCM", "COND", "RESULT", "UNITS", "LO_LIMIT", "HI_LIMIT", "PASS", "GRADE"]
PART_COLUMNS = ["LOT_ID", "PART_ID", "HEAD_NUM", "SITE_NUM", "HARD_BIN", "SOFT_BIN", "GRADE", "PASS",
                "TEST_T", "RETEST", "FAIL_TEST", "FAULT", "END_T"]
HEAD_NUM = 1
MARKER = "in_progress.json"
END_OF_LOT_FILES = ("manifest.json", "lot.stdf", "sim_truth.csv")


class DatalogError(Exception):
    """The datalog folder cannot be used (exists already, not writable, ...)."""


@dataclass(frozen=True)
class ResultRow:
    test: TestDef
    value: float
    low: float | None = None
    high: float | None = None
    passed: bool | None = None
    grade: str | None = None


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


def sha256_of(path: Path) -> str:
    digest = hashlib.sha256()
    with open(path, "rb") as handle:
        for block in iter(lambda: handle.read(1 << 16), b""):
            digest.update(block)
    return digest.hexdigest()


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


def _fsync(handle) -> None:
    handle.flush()
    os.fsync(handle.fileno())


def fsync_dir(folder: Path) -> None:
    """Make a rename or an unlink in `folder` durable (POSIX; a no-op where not supported)."""
    try:
        fd = os.open(folder, os.O_RDONLY)
    except OSError:
        return
    try:
        os.fsync(fd)
    except OSError:
        pass
    finally:
        os.close(fd)


def write_durably(path: Path, text: str) -> None:
    """Write `text` to `path` so that a crash leaves the old file or the new one, never half."""
    temp = path.with_name(path.name + ".tmp")
    with open(temp, "w", encoding="utf-8", newline="") as handle:
        handle.write(text)
        _fsync(handle)
    os.replace(temp, path)
    fsync_dir(path.parent)


def check_writable(folder: Path) -> None:
    """Refuse a datalog folder that cannot be created or written, before anything is powered."""
    probe = Path(folder)
    while not probe.exists():
        if probe.parent == probe:
            break
        probe = probe.parent
    if probe.exists() and not probe.is_dir():
        raise DatalogError(f"cannot write the datalog in {folder}: {probe} is a file, not a folder")
    if not os.access(probe, os.W_OK | os.X_OK):
        raise DatalogError(f"cannot write the datalog in {folder}: {probe} is not writable "
                           "(choose another --out)")


class DatalogWriter:
    """Writes one lot run into `folder`; refuses a folder that holds a datalog unless `force`."""

    def __init__(self, folder: Path, *, force: bool = False, resume=None) -> None:
        self.folder = Path(folder)
        self.resume = resume            # a lot_resume.ResumeState: continue that lot here
        if resume is None and (self.folder / "lot.json").exists() and not force:
            raise DatalogError(f"{self.folder} already holds a datalog; choose another --out, "
                               "pass --resume to continue it, or --force to overwrite it")
        if self.folder.exists() and not self.folder.is_dir():
            raise DatalogError(f"{self.folder} exists and is not a folder")
        check_writable(self.folder)
        self.header: dict[str, Any] = {}
        self._results = None
        self._parts = None
        self.part_rows = 0              # data rows in parts.csv / results.csv, for the marker
        self.result_rows = 0

    def start(self, header: dict[str, Any], copies: dict[str, Path]) -> None:
        """Create the folder, copy the applied files (`copies`: key -> source) and write lot.json.

        When resuming, the folder's CSV files are first cut back to whole parts (see
        lot_resume) and then appended to; lot.json keeps its header and gains a resume time.
        """
        if self.resume is not None:
            self._start_resumed(header)
            return
        try:
            self.folder.mkdir(parents=True, exist_ok=True)
            for name in ("results.csv", "parts.csv", MARKER, *END_OF_LOT_FILES):
                (self.folder / name).unlink(missing_ok=True)
            self.header = {"format": FORMAT, **header}
            for key, source in copies.items():
                target = self.folder / f"{key}.yaml"
                shutil.copyfile(source, target)
                self.header[key] = {"file": target.name, "source": str(Path(source).resolve()),
                                    "sha256": sha256_of(target)}
            self.header.setdefault("start_t", time.time())
            self.header["start_time"] = iso_utc(self.header["start_t"])
            self.header["complete"] = False
            self.write_header()
            self._results = open(self.folder / "results.csv", "w", newline="", encoding="utf-8")
            self._parts = open(self.folder / "parts.csv", "w", newline="", encoding="utf-8")
        except OSError as exc:
            raise DatalogError(f"cannot write the datalog in {self.folder}: {exc}") from None
        csv.writer(self._results).writerow(RESULT_COLUMNS)
        csv.writer(self._parts).writerow(PART_COLUMNS)
        _fsync(self._results)
        _fsync(self._parts)

    def _start_resumed(self, header: dict[str, Any]) -> None:
        state = self.resume
        try:
            state.apply()               # whole parts only, marker rows dropped
            for name in END_OF_LOT_FILES:
                (self.folder / name).unlink(missing_ok=True)
            self.header = dict(state.header)
            self.header["instruments"] = header.get("instruments", self.header.get("instruments"))
            now = time.time()
            self.header["resumed"] = [*self.header.get("resumed", []), iso_utc(now)]
            self.header["complete"] = False
            for key in ("end_t", "end_time", "stopped_because", "safe_state"):
                self.header.pop(key, None)
            self.write_header()
            self._results = open(self.folder / "results.csv", "a", newline="", encoding="utf-8")
            self._parts = open(self.folder / "parts.csv", "a", newline="", encoding="utf-8")
        except OSError as exc:
            raise DatalogError(f"cannot write the datalog in {self.folder}: {exc}") from None
        self.part_rows = len(state.part_rows)
        self.result_rows = len(state.result_rows)

    def mark_in_progress(self, ids: list[str], presented_before: int) -> None:
        """Before an index: which parts are under test, and the row counts to go back to."""
        marker = {"lot_id": self.header.get("lot_id"), "ids": ids, "presented_before": presented_before,
                  "parts_rows": self.part_rows, "results_rows": self.result_rows, "t": time.time()}
        write_durably(self.folder / MARKER, json.dumps(marker) + "\n")

    def clear_in_progress(self) -> None:
        """After an index is logged: nothing in progress."""
        (self.folder / MARKER).unlink(missing_ok=True)
        fsync_dir(self.folder)

    def write_header(self) -> None:
        """(Re)write lot.json atomically: a crash leaves the old or the new one, never half."""
        write_durably(self.folder / "lot.json", json.dumps(self.header, indent=2) + "\n")

    def write_part(self, part: PartRecord, rows: list[ResultRow]) -> None:
        lot = self.header["lot_id"]
        results = csv.writer(self._results)
        for row in rows:
            t = row.test
            results.writerow([_cell(v) for v in (
                lot, part.part_id, HEAD_NUM, part.site, t.test_num, t.test_txt, t.param, t.region or "",
                t.vcm, t.cond, float(row.value), t.units, row.low, row.high, row.passed, row.grade)])
        csv.writer(self._parts).writerow([_cell(v) for v in (
            lot, part.part_id, HEAD_NUM, part.site, part.hard_bin, part.soft_bin, part.grade, part.passed,
            part.test_t_ms, part.retest, part.fail_test, part.fault, round(part.end_t, 3))])
        # Results first, then the part row: a part row on disk means its results are too.
        _fsync(self._results)
        _fsync(self._parts)
        self.result_rows += len(rows)
        self.part_rows += 1

    def finish(self, updates: dict[str, Any]) -> None:
        """Close the CSV files and rewrite lot.json with the end-of-lot figures."""
        for handle in (self._results, self._parts):
            if handle is not None and not handle.closed:
                _fsync(handle)
                handle.close()
        self.header.update(updates)
        self.header.setdefault("end_t", time.time())
        self.header["end_time"] = iso_utc(self.header["end_t"])
        self.write_header()

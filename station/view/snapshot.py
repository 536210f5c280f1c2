"""The page's data: one snapshot of a lot computed from its datalog folder alone.

`station view DATALOG` and the live page of `station run/dry-run --view` share this code path:
the folder (lot.json, parts.csv and the copy of the limit table) is the only input, read
incrementally, so a second screen shows exactly what the datalog holds. Counting follows the
summary's definitions (station/review/summary.py): parts tested are rows of parts.csv
(retests included), yield is good / (good + failed) with tester faults left out, bin shares
are of all rows.

A live lot adds one thing the folder cannot say yet: that the process is on its way out and
putting the bench in its safe state (`phase`).
"""

from __future__ import annotations

import json
import math
import time
from dataclasses import dataclass
from pathlib import Path
from typing import Any

import numpy as np
import pandas as pd

from station.config.files import ConfigError
from station.config.limit_tables import LimitTable, load_limit_table
from station.datalog.folder import LOT_JSON, PART_COLUMNS, PARTS_CSV, DatalogError, read_lot_header
from station.review.sites import site_table
from station.review.summary import bin_counts, grade_yield
from station.review.units import fmt
from station.view.alarms import read_alarms
from station.view.follow import PartsFollower

LAST_FAILING = 8          # failing parts listed, newest first
RATE_WINDOW = 100         # parts/hour over the last this many rows (END_T), for the remaining time
QUIET_AFTER_S = 600.0     # a lot not complete and no new row for this long: say so


@dataclass
class Phase:
    """What the live station process says beside the folder: None while it screens, or
    "safe state" once it is on the way out (lot.json is rewritten only after that)."""

    value: str | None = None


class LotSnapshots:
    """Snapshots of one datalog folder, each from the files as they are now."""

    def __init__(self, folder: Path, expected_parts: int | None = None, phase: Phase | None = None) -> None:
        self.folder = Path(folder)
        self.expected_parts = expected_parts
        self.phase = phase or Phase()
        self.parts = PartsFollower(self.folder / PARTS_CSV)
        self._header: dict[str, Any] | None = None
        self._header_stamp: tuple[int, int, int] | None = None
        self._limits: tuple[str, LimitTable | None, str] | None = None   # (sha256, table, problem)

    def signature(self) -> tuple:
        """Changes whenever anything the page shows may have changed (not the clock)."""
        return (_stamp(self.folder / LOT_JSON), _stamp(self.folder / PARTS_CSV), self.phase.value)

    def compute(self, now: float | None = None) -> dict[str, Any]:
        now = time.time() if now is None else now
        # The phase before the files: every row is written before the way out begins, so a
        # snapshot that says "safe state" holds them all.
        phase = self.phase.value
        snapshot: dict[str, Any] = {"generated_t": now, "folder": str(self.folder), "problems": []}
        try:
            header = self._read_header()
        except DatalogError as exc:
            if not (self.folder / LOT_JSON).exists():
                snapshot["state"] = _state("waiting", "WAITING", "waiting for the lot to start "
                                           f"(no {LOT_JSON} in {self.folder} yet)")
                return snapshot
            snapshot["problems"].append(str(exc))
            header = self._header or {}
        try:
            self.parts.poll()
        except DatalogError as exc:
            snapshot["problems"].append(str(exc))
        frame = parts_frame(self.parts.rows)
        table = self._limit_table(header, snapshot["problems"])
        snapshot.update(lot_fields(header))
        snapshot["files"] = file_fields(header)
        snapshot["limits"] = limit_fields(table)
        snapshot["progress"] = progress_fields(header, frame, now, self._expected(header))
        snapshot["totals"] = totals(frame)
        snapshot["grades"] = grade_fields(frame, table)
        snapshot["hard_bins"] = hard_bin_fields(frame, header, table)
        snapshot["sites"] = site_fields(frame)
        snapshot["last_failing"] = last_failing(frame, header, table)
        alarms, alarm_problems = read_alarms(header)
        snapshot["alarms"] = [alarm_with_evidence(a, frame) for a in alarms]
        snapshot["problems"] += alarm_problems
        snapshot["paused"] = header.get("paused") is True
        pause = header.get("pause")
        snapshot["pause"] = pause if snapshot["paused"] and isinstance(pause, dict) else None
        decisions = header.get("operator_decisions")
        snapshot["decisions"] = [d for d in decisions if isinstance(d, dict)] if isinstance(decisions, list) else []
        snapshot["safe_state"] = [str(line) for line in header.get("safe_state") or []]
        ends = frame["END_T"].dropna()
        quiet_s = now - float(ends.iloc[-1]) if len(ends) else 0.0
        snapshot["state"] = bench_state(header, frame, phase, quiet_s)
        return snapshot

    def _expected(self, header: dict[str, Any]) -> int | None:
        if self.expected_parts:
            return self.expected_parts
        dry = header.get("dry_run")
        parts = dry.get("parts") if isinstance(dry, dict) else None
        return int(parts) if isinstance(parts, int) and parts > 0 else None

    def _read_header(self) -> dict[str, Any]:
        stamp = _stamp(self.folder / LOT_JSON)
        if self._header is None or stamp != self._header_stamp:
            self._header = read_lot_header(self.folder)
            self._header_stamp = stamp
        return self._header

    def _limit_table(self, header: dict[str, Any], problems: list[str]) -> LimitTable | None:
        """The lot's own copy of the limit table (read again only when its hash changes)."""
        info = header.get("limits") or {}
        sha = str(info.get("sha256", ""))
        if self._limits is None or self._limits[0] != sha:
            path = self.folder / str(info.get("file", "limits.yaml"))
            try:
                self._limits = (sha, load_limit_table(path), "")
            except (ConfigError, OSError) as exc:
                self._limits = (sha, None, f"limit table copy {path}: {exc}")
        if self._limits[2]:
            problems.append(self._limits[2])
        return self._limits[1]


def _stamp(path: Path) -> tuple[int, int, int]:
    # The inode too: lot.json is rewritten by rename, which may keep its size and time.
    try:
        info = path.stat()
    except OSError:
        return (-1, -1, -1)
    return (info.st_ino, info.st_size, info.st_mtime_ns)


def _state(key: str, label: str, detail: str) -> dict[str, str]:
    return {"key": key, "label": label, "detail": detail}


# --- the parts table ----------------------------------------------------------------------

def parts_frame(rows: list[list[str]]) -> pd.DataFrame:
    """parts.csv rows (text, checked by the format) as the columns the summary functions use."""
    frame = pd.DataFrame(rows, columns=PART_COLUMNS)
    if frame.empty:
        frame = pd.DataFrame({c: pd.Series(dtype=object) for c in PART_COLUMNS})
    for column in ("SITE_NUM", "HARD_BIN", "SOFT_BIN"):
        frame[column] = frame[column].astype(np.int64)
    for column in ("PASS", "FAIL_TEST", "TEST_T", "END_T"):
        frame[column] = pd.to_numeric(frame[column].replace("", np.nan), errors="coerce").astype(float)
    return frame


def totals(frame: pd.DataFrame) -> dict[str, Any]:
    good = int((frame["PASS"] == 1).sum())
    failed = int((frame["PASS"] == 0).sum())
    return {"tested": len(frame), "good": good, "failed": failed,
            "tester_faults": int(frame["PASS"].isna().sum()),
            "retests": int((frame["RETEST"] == "1").sum()),
            "yield": good / (good + failed) if good + failed else None}


# --- header, files, limits ----------------------------------------------------------------

def lot_fields(header: dict[str, Any]) -> dict[str, Any]:
    keys = ("lot_id", "product", "station", "operator", "mode", "start_time", "end_time", "sites")
    return {"lot": {key: header.get(key) for key in keys}}


def file_fields(header: dict[str, Any]) -> list[dict[str, str]]:
    out = []
    for role in ("sequence", "limits", "bench"):
        info = header.get(role)
        if isinstance(info, dict):
            out.append({"role": role, "source": str(info.get("source", info.get("file", ""))),
                        "sha256": str(info.get("sha256", ""))})
    return out


def limit_fields(table: LimitTable | None) -> list[dict[str, Any]]:
    """Each grade (best first) with its hard bin and its limits as an engineer writes them."""
    if table is None:
        return []
    grades = []
    for grade in table.grades:
        limits = [{"param": limit.param, "region": limit.region or "",
                   "low": fmt(limit.low, limit.units, with_unit=True),
                   "high": fmt(limit.high, limit.units, with_unit=True)} for limit in grade.limits]
        grades.append({"grade": grade.name, "hard_bin": grade.hard_bin, "limits": limits})
    return grades


# --- time -----------------------------------------------------------------------------------

def progress_fields(header: dict[str, Any], frame: pd.DataFrame, now: float,
                    expected: int | None) -> dict[str, Any]:
    start, end = header.get("start_t"), header.get("end_t")
    ended = isinstance(end, int | float)
    stop = float(end) if isinstance(end, int | float) else now
    elapsed = stop - float(start) if isinstance(start, int | float) else None
    finished = int(frame["PART_ID"].nunique())
    rate = recent_rate(frame["END_T"].to_numpy(), frame["SITE_NUM"].to_numpy())
    remaining = None
    if expected and rate and not ended:
        remaining = max(expected - finished, 0) / rate * 3600.0
    return {"elapsed_s": elapsed, "parts": finished, "rows": len(frame), "expected": expected,
            "parts_per_hour": rate, "remaining_s": remaining, "ended": ended}


def recent_rate(end_t: np.ndarray, sites: np.ndarray) -> float | None:
    """Part rows per hour over the last RATE_WINDOW rows (None: fewer than two indexes).

    The rows of one handler index are logged one after the other with rising site numbers,
    so an index starts where the site number does not rise (the summary's rule). The rate is
    the rows of the indexes after the first of the window over the time from the end of that
    first index to the end of the last one."""
    keep = ~np.isnan(end_t)
    times, site = end_t[keep][-RATE_WINDOW:], sites[keep][-RATE_WINDOW:]
    if len(times) < 2:
        return None
    starts = np.flatnonzero(np.r_[True, site[1:] <= site[:-1]])
    if len(starts) < 2:
        return None
    first_end = float(times[starts[1] - 1])
    span = float(times[-1]) - first_end
    if span <= 0:
        return None
    return 3600.0 * (len(times) - starts[1]) / span


# --- yield, bins, sites -----------------------------------------------------------------

def grade_fields(frame: pd.DataFrame, table: LimitTable | None) -> list[dict[str, Any]]:
    order = [g.name for g in table.grades] if table is not None else []
    grades = grade_yield(frame, order)
    return [{"grade": str(row.grade), "parts": int(row.parts), "share": _number(row.share)}
            for row in grades.itertuples()]


def hard_bin_fields(frame: pd.DataFrame, header: dict[str, Any],
                    table: LimitTable | None) -> list[dict[str, Any]]:
    """Every hard bin of the table (zero counts too, so the operator sees them all)."""
    names: dict[int, str] = {}
    passing: dict[int, bool] = {}
    if table is not None:
        for number, bin_def in table.hard_bins.items():
            names[number], passing[number] = bin_def.name, bin_def.passing
    for number, info in (header.get("hard_bins") or {}).items():
        names.setdefault(int(number), str(info.get("name", "")))
        passing.setdefault(int(number), bool(info.get("pass", False)))
    counts = {int(row.bin): int(row.count) for row in bin_counts(frame, "HARD_BIN", names, passing).itertuples()}
    out = []
    for number in sorted(set(names) | set(counts)):
        count = counts.get(number, 0)
        out.append({"bin": number, "name": names.get(number, ""), "pass": passing.get(number, False),
                    "count": count, "share": count / len(frame) if len(frame) else None})
    return out


def site_fields(frame: pd.DataFrame) -> dict[str, Any]:
    """Yield per site and the site-difference test of the summary (station/review/sites.py)."""
    if frame.empty:
        return {"rows": [], "test": "no parts yet", "flagged": False}
    sites, test = site_table(frame)
    rows = [{"site": int(row["site"]), "tested": int(row["tested"]), "good": int(row["good"]),
             "failed": int(row["failed"]), "faults": int(row["faults"]), "yield": _number(row["yield"]),
             "p_vs_rest": _number(row["p_vs_rest"]), "differs": bool(row["differs"])}
            for row in sites.to_dict("records")]
    return {"rows": rows, "test": test.describe(), "flagged": test.flagged or any(r["differs"] for r in rows)}


def _number(value: Any) -> float | None:
    number = float(value)
    return None if math.isnan(number) else number


# --- failing parts, alarms, state -------------------------------------------------------

def test_names(header: dict[str, Any]) -> dict[int, str]:
    out = {}
    for test in header.get("tests") or []:
        if isinstance(test, dict) and isinstance(test.get("test_num"), int):
            out[test["test_num"]] = str(test.get("test_txt", ""))
    return out


def last_failing(frame: pd.DataFrame, header: dict[str, Any], table: LimitTable | None) -> list[dict[str, Any]]:
    """The newest failed parts and tester faults, with the test that failed them."""
    names = test_names(header)
    soft = table.soft_bins if table is not None else {}
    failing = frame[frame["PASS"] != 1].tail(LAST_FAILING).iloc[::-1]
    out = []
    for row in failing.itertuples():
        fail_test = None if math.isnan(row.FAIL_TEST) else int(row.FAIL_TEST)
        soft_def = soft.get(int(row.SOFT_BIN))
        if math.isnan(row.PASS):
            what = f"tester fault: {row.FAULT}" if row.FAULT else "tester fault"
        elif fail_test is not None:
            what = f"{fail_test} {names.get(fail_test, '')}".strip()
        else:                     # contact failures carry no test number: their bin says it
            what = soft_def.name if soft_def else "failed"
        out.append({"part_id": row.PART_ID, "site": int(row.SITE_NUM), "hard_bin": int(row.HARD_BIN),
                    "soft_bin": int(row.SOFT_BIN), "bin_name": soft_def.name if soft_def else "",
                    "fail_test": fail_test, "what": what, "end_t": _number(row.END_T),
                    "fault": bool(math.isnan(row.PASS))})
    return out


def alarm_with_evidence(alarm: dict[str, Any], frame: pd.DataFrame) -> dict[str, Any]:
    """An alarm as lot control wrote it, with the logged bin of each part it names."""
    last = frame.drop_duplicates("PART_ID", keep="last").set_index("PART_ID") if not frame.empty else None
    evidence = []
    for pid in alarm["parts"]:
        if last is not None and pid in last.index:
            row = last.loc[pid]
            evidence.append({"part_id": pid, "site": int(row["SITE_NUM"]), "hard_bin": int(row["HARD_BIN"]),
                             "soft_bin": int(row["SOFT_BIN"])})
        else:
            evidence.append({"part_id": pid, "site": None, "hard_bin": None, "soft_bin": None})
    return {**alarm, "evidence": evidence}


def bench_state(header: dict[str, Any], frame: pd.DataFrame, phase: str | None,
                quiet_s: float) -> dict[str, str]:
    """What the bench is doing, as far as the folder (and a live process) can tell."""
    unverified = [str(x) for x in header.get("safe_state_unverified") or []]
    not_safe = f"; bench NOT confirmed safe: {'; '.join(unverified)}" if unverified else ""
    if isinstance(header.get("end_t"), int | float):
        why = str(header.get("stopped_because") or "")
        if why:
            return _state("stopped", "STOPPED", f"lot stopped: {why}{not_safe}")
        if unverified:
            return _state("stopped", "NOT SAFE", f"lot complete{not_safe}")
        return _state("safe", "SAFE STATE", "lot complete; sources at 0 V, outputs off, relays open")
    if phase == "safe state":
        return _state("safe", "SAFE STATE", "the lot is ending: ramping the sources to 0 V and turning "
                                            "the outputs off")
    if header.get("paused") is True:
        return _state("paused", "PAUSED", "lot control paused the lot (see the alarms)")
    if not frame.empty and math.isnan(frame["PASS"].iloc[-1]) and frame["FAULT"].iloc[-1]:
        return _state("fault", "TESTER FAULT", f"{frame['FAULT'].iloc[-1]}; recovering, the parts are "
                                               "tested again")
    if not frame.empty and quiet_s > QUIET_AFTER_S:
        return _state("quiet", "NO NEW PARTS", f"no part logged for {quiet_s / 60:.0f} min "
                                               "(waiting for parts, or the station stopped)")
    return _state("testing", "TESTING", "screening parts")


def snapshot_json(snapshot: dict[str, Any]) -> str:
    return json.dumps(snapshot, separators=(",", ":"), allow_nan=False)

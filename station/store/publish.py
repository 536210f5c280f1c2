"""Publishing datalog folders into the store: COPY in batches, resumable, never a part twice.

The folder stays the system of record; the store mirrors it. A lot is found (or made) by its
idempotent key, and its row is locked for the batch (two publishers of one lot take turns).
Parts already in the store are compared with the folder's first rows: the ones that agree
are kept, the rest of the folder is copied; should the folder have been rewritten since (a
resumed lot drops its interrupted index), the store's rows from the first disagreement on
are replaced. Each batch of parts goes in with its result rows in one transaction, so a kill
or a lost connection loses at most the batch in flight, and the next publish resumes there.
Rows of an index still under test (in_progress.json) are left for a later publish.
"""

from __future__ import annotations

import io
import json
from collections.abc import Callable
from dataclasses import dataclass
from pathlib import Path
from typing import Any

import numpy as np
import pandas as pd
import psycopg

from station.datalog.folder import MARKER, DatalogError
from station.review.load import read_datalog_folder

BATCH_PARTS = 2000

PART_COPY = ["part_seq", "part_id", "head_num", "site_num", "hard_bin", "soft_bin", "grade", "pass",
             "test_t", "retest", "fail_test", "fault", "end_t"]
RESULT_COPY = ["part_seq", "test_num", "test_txt", "param", "region", "vcm", "cond", "result", "units",
               "lo_limit", "hi_limit", "pass", "grade"]
_PART_TEXT = ["part_id", "grade", "fault"]
_RESULT_TEXT = ["test_txt", "param", "region", "units", "grade"]


@dataclass
class FolderData:
    """One folder read for publishing: the header and the rows that are finished."""

    folder: Path
    lot: dict[str, Any]
    parts: pd.DataFrame      # PART_SEQ = row number in parts.csv
    results: pd.DataFrame
    limits_text: str | None
    files: dict[str, tuple[str, str]]      # kind -> (sha256, text) of the applied copies
    held_back: int = 0                     # part rows of an index still under test


@dataclass
class Published:
    folder: Path
    lot_id: str
    station: str
    parts_in_folder: int
    parts_before: int        # already in the store, agreeing with the folder
    parts_added: int
    parts_replaced: int      # store rows the folder no longer has (rewritten by a resume)
    held_back: int


def read_folder(folder: Path) -> FolderData:
    lot, parts, results, _notes = read_datalog_folder(folder)
    held = 0
    marker = folder / MARKER
    if marker.is_file():
        try:
            rows = int(json.loads(marker.read_text(encoding="utf-8"))["parts_rows"])
        except (OSError, ValueError, KeyError, TypeError):
            rows = 0                # a marker being rewritten: publish this folder's rows later
        held = max(len(parts) - rows, 0)
        parts = parts[parts["PART_SEQ"] < rows]
        results = results[results["PART_SEQ"] < rows]
    files: dict[str, tuple[str, str]] = {}
    for kind in ("sequence", "limits", "bench"):
        info = lot.get(kind) or {}
        path = folder / str(info.get("file", f"{kind}.yaml"))
        if info.get("sha256") and path.is_file():
            files[kind] = (str(info["sha256"]), path.read_text(encoding="utf-8", errors="replace"))
    limits_text = files["limits"][1] if "limits" in files else None
    return FolderData(folder, lot, parts, results, limits_text, files, held)


def lot_key_values(lot: dict[str, Any]) -> tuple[str, str, str, str, str]:
    """(station, lot id, start time, sequence SHA-256, limits SHA-256): the lot's identity."""
    return (str(lot.get("station") or ""), str(lot.get("lot_id") or ""), str(lot.get("start_time") or ""),
            str((lot.get("sequence") or {}).get("sha256") or ""),
            str((lot.get("limits") or {}).get("sha256") or ""))


def publish_folder(conn: psycopg.Connection, data: FolderData, batch_parts: int = BATCH_PARTS,
                   after_batch: Callable[[int], None] | None = None) -> Published:
    """Publish one folder; `after_batch(parts in store)` is called after each committed batch.
    The connection must be in autocommit mode, so that each batch commits at its end."""
    if not conn.autocommit:
        raise ValueError("publish_folder needs an autocommit connection (each batch is its own transaction)")
    station, lot_id, _, _, _ = lot_key_values(data.lot)
    if not lot_id:
        raise DatalogError(f"{data.folder}/lot.json: lot_id missing (cannot publish a lot without its id)")
    folder_ids = data.parts["PART_ID"].to_numpy(dtype=object)
    folder_end = data.parts["END_T"].to_numpy(dtype=float)
    total = len(data.parts)
    before = replaced = added = 0
    first = True
    while True:
        with conn.transaction():
            lot_key = _upsert_lot(conn, data)
            stored = conn.execute("SELECT part_seq, part_id, end_t FROM parts WHERE lot_key = %s "
                                  "ORDER BY part_seq", (lot_key,)).fetchall()
            agree = _agreeing_prefix(stored, folder_ids, folder_end)
            if agree < len(stored):
                conn.execute("DELETE FROM results WHERE lot_key = %s AND part_seq >= %s", (lot_key, agree))
                conn.execute("DELETE FROM parts WHERE lot_key = %s AND part_seq >= %s", (lot_key, agree))
                replaced += len(stored) - agree
            if first:
                before, first = agree, False
                _write_lot_details(conn, lot_key, data)
            end = min(agree + batch_parts, total)
            if end > agree:
                _copy_rows(conn, lot_key, data, agree, end)
                added += end - agree
        if end > agree and after_batch is not None:
            after_batch(end)
        if end >= total:
            break
    return Published(data.folder, lot_id, station, total, before, added, replaced, data.held_back)


def _agreeing_prefix(stored: list[tuple], ids: np.ndarray, end_t: np.ndarray) -> int:
    """How many stored rows are the folder's first rows (same seq, id and end time)."""
    for n, (seq, part_id, stored_end) in enumerate(stored):
        if seq != n or n >= len(ids) or part_id != ids[n]:
            return n
        folder_end = end_t[n]
        if (stored_end is None) != bool(np.isnan(folder_end)) or (
                stored_end is not None and stored_end != folder_end):
            return n
    return len(stored)


def _upsert_lot(conn: psycopg.Connection, data: FolderData) -> int:
    """The lot's key, its row made or updated (end time, completeness) and locked."""
    lot = data.lot
    station, lot_id, start_time, seq_sha, lim_sha = lot_key_values(lot)
    row = conn.execute(
        "INSERT INTO stations (name) VALUES (%s) ON CONFLICT (name) DO UPDATE SET name = EXCLUDED.name "
        "RETURNING station_key", (station,)).fetchone()
    assert row is not None
    start_t, end_t = lot.get("start_t"), lot.get("end_t")
    header = json.dumps(lot)
    row = conn.execute(
        """INSERT INTO lots (station_key, lot_id, start_time, sequence_sha256, limits_sha256, bench_sha256,
                             start_t, end_t, product, operator, mode, complete, header)
           VALUES (%s, %s, %s, %s, %s, %s, %s, %s, %s, %s, %s, %s, %s::jsonb)
           ON CONFLICT (station_key, lot_id, start_time, sequence_sha256, limits_sha256) DO UPDATE SET
               end_t = EXCLUDED.end_t, complete = EXCLUDED.complete, header = EXCLUDED.header,
               bench_sha256 = EXCLUDED.bench_sha256, published_at = now()
           RETURNING lot_key""",
        (row[0], lot_id, start_time, seq_sha, lim_sha, str((lot.get("bench") or {}).get("sha256") or ""),
         start_t if isinstance(start_t, int | float) else None, end_t if isinstance(end_t, int | float) else None,
         str(lot.get("product") or ""), str(lot.get("operator") or ""), str(lot.get("mode") or ""),
         bool(lot.get("complete", False)), header)).fetchone()
    assert row is not None
    return int(row[0])


def _write_lot_details(conn: psycopg.Connection, lot_key: int, data: FolderData) -> None:
    """Bins, limits applied, alarms and the applied files: replaced whole (they are small)."""
    for kind, (sha, text) in data.files.items():
        conn.execute("INSERT INTO applied_files (sha256, kind, content) VALUES (%s, %s, %s) "
                     "ON CONFLICT (sha256) DO NOTHING", (sha, kind, text))
    conn.execute("DELETE FROM bins WHERE lot_key = %s", (lot_key,))
    with conn.cursor() as cur:
        rows = [(lot_key, kind[:4], int(number), str(info.get("name", "")), bool(info.get("pass", False)))
                for kind in ("hard_bins", "soft_bins") for number, info in (data.lot.get(kind) or {}).items()]
        cur.executemany("INSERT INTO bins (lot_key, kind, bin, name, passing) VALUES (%s, %s, %s, %s, %s)", rows)
        conn.execute("DELETE FROM limits_applied WHERE lot_key = %s", (lot_key,))
        cur.executemany("INSERT INTO limits_applied (lot_key, grade_rank, grade, param, region, lsl, usl, units) "
                        "VALUES (%s, %s, %s, %s, %s, %s, %s, %s)", _limit_rows(lot_key, data))
        conn.execute("DELETE FROM alarms WHERE lot_key = %s", (lot_key,))
        cur.executemany("INSERT INTO alarms (lot_key, seq, kind, message) VALUES (%s, %s, %s, %s)",
                        [(lot_key, n, kind, text) for n, (kind, text) in enumerate(alarms_of(data))])


def _limit_rows(lot_key: int, data: FolderData) -> list[tuple]:
    from station.config.files import ConfigError
    from station.config.limit_tables import parse_limit_table
    from station.review.limits import table_limits

    if data.limits_text is None:
        return []
    try:
        table = parse_limit_table(data.limits_text, str(data.folder / "limits.yaml"))
    except ConfigError:
        return []
    frame = table_limits(table)
    rank = {g.name: i for i, g in enumerate(table.grades)}
    return [(lot_key, rank[r.GRADE], r.GRADE, r.PARAM, r.REGION, _num(r.LSL), _num(r.USL), r.UNITS)
            for r in frame.itertuples()]


def alarms_of(data: FolderData) -> list[tuple[str, str]]:
    """What went wrong on the lot, as (kind, message): the stop, the safe state, tester faults."""
    alarms: list[tuple[str, str]] = []
    stopped = data.lot.get("stopped_because")
    if stopped:
        alarms.append(("lot stopped", str(stopped)))
    for line in data.lot.get("safe_state") or []:
        if "FAILED" in str(line):
            alarms.append(("safe state", str(line)))
    for line in data.lot.get("safe_state_unverified") or []:
        alarms.append(("safe state not verified", str(line)))
    faults = data.parts[data.parts["FAULT"].astype(str) != ""]
    for row in faults.itertuples():
        alarms.append(("tester fault", f"{row.PART_ID} site {row.SITE_NUM}: {row.FAULT}"))
    return alarms


def _num(value: float) -> float | None:
    return None if value is None or (isinstance(value, float) and np.isnan(value)) else float(value)


def _copy_rows(conn: psycopg.Connection, lot_key: int, data: FolderData, start: int, end: int) -> None:
    parts = data.parts[(data.parts["PART_SEQ"] >= start) & (data.parts["PART_SEQ"] < end)]
    results = data.results[(data.results["PART_SEQ"] >= start) & (data.results["PART_SEQ"] < end)]
    copy_frame(conn, "parts", lot_key, part_frame(parts), PART_COPY, _PART_TEXT)
    copy_frame(conn, "results", lot_key, result_frame(results), RESULT_COPY, _RESULT_TEXT)


def part_frame(parts: pd.DataFrame) -> pd.DataFrame:
    """parts.csv rows (as review.load reads them) under the store's column names."""
    return pd.DataFrame({
        "part_seq": parts["PART_SEQ"].astype("int32"), "part_id": parts["PART_ID"],
        "head_num": parts["HEAD_NUM"], "site_num": parts["SITE_NUM"], "hard_bin": parts["HARD_BIN"],
        "soft_bin": parts["SOFT_BIN"], "grade": parts["GRADE"], "pass": parts["PASS"].astype("Int16"),
        "test_t": parts["TEST_T"], "retest": parts["RETEST"].astype("int16"),
        "fail_test": parts["FAIL_TEST"].astype("Int64"), "fault": parts["FAULT"], "end_t": parts["END_T"]})


def result_frame(results: pd.DataFrame) -> pd.DataFrame:
    """results.csv rows (with PART_SEQ) under the store's column names."""
    return pd.DataFrame({
        "part_seq": results["PART_SEQ"].astype("int32"), "test_num": results["TEST_NUM"],
        "test_txt": results["TEST_TXT"].astype(str), "param": results["PARAM"].astype(str),
        "region": results["REGION"].astype(str), "vcm": results["VCM"], "cond": results["COND"],
        "result": results["RESULT"], "units": results["UNITS"].astype(str), "lo_limit": results["LO_LIMIT"],
        "hi_limit": results["HI_LIMIT"], "pass": results["PASS"].astype("Int16"),
        "grade": results["GRADE"].astype(str)})


def copy_frame(conn: psycopg.Connection, table: str, lot_key: int, frame: pd.DataFrame,
               columns: list[str], text_columns: list[str]) -> None:
    """COPY a frame as CSV: an empty cell is NULL, except in text columns (kept as '');
    floats are written by pandas at full precision ('inf' is over-range)."""
    if frame.empty:
        return
    frame = frame[columns].copy()
    frame.insert(0, "lot_key", lot_key)
    buffer = io.StringIO()
    frame.to_csv(buffer, index=False, header=False)
    names = ", ".join(["lot_key", *columns])
    keep = ", ".join(text_columns)
    # Table and column names are the module's constants, never input.
    with conn.cursor() as cur, cur.copy(
            f"COPY {table} ({names}) FROM STDIN (FORMAT csv, FORCE_NOT_NULL ({keep}))") as copy:
        copy.write(buffer.getvalue())

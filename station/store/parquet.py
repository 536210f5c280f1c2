"""Long history as Parquet, partitioned by product and month, queried in place with DuckDB.

Layout of an export folder (every file named by the lot's key, so exporting a lot again
replaces its files, never adds a second copy):

    lots/<key>.parquet                 one row: key, station, lot id, product, times, limits SHA-256, lot.json
    bins/<key>.parquet                 bin names and pass flags of the lot
    applied_files/<sha256>.parquet     the limit table (and sequence, bench) the lot applied
    parts/product=<P>/month=<YYYY-MM>/<key>.parquet
    results/product=<P>/month=<YYYY-MM>/<key>.parquet

The key is a 63-bit number from the SHA-256 of the lot's identity (station, lot id, start
time, sequence and limit-table hashes), the same whether the lot came from its folder or from
the store. The month is the lot's start (UTC). `parquet_summary` points DuckDB views with the
store's table names at these files and runs the store's SQL summary on them.
"""

from __future__ import annotations

import hashlib
import json
import os
from collections.abc import Callable, Iterable, Iterator
from dataclasses import dataclass
from datetime import UTC, datetime
from pathlib import Path
from urllib.parse import quote

import pandas as pd
import pyarrow as pa
import pyarrow.parquet as pq

from station.datalog.folder import DatalogError
from station.store.publish import lot_key_values, part_frame, read_folder, result_frame
from station.store.summary_sql import Selection, summarise_sql

TABLES = ("lots", "bins", "applied_files", "parts", "results")


@dataclass
class LotExport:
    """One lot's rows, ready to write."""

    lot: dict                  # lot_key, station, lot_id, product, start_t, end_t, start_time, limits_sha256,
                               # complete, header (lot.json as text, for the report)
    bins: pd.DataFrame         # kind, bin, name, passing
    files: list[tuple[str, str, str]]   # (sha256, kind, content)
    parts: pd.DataFrame        # the store's part columns
    results: pd.DataFrame


def lot_uid(lot: dict) -> int:
    identity = "\x1f".join(lot_key_values(lot))
    return int.from_bytes(hashlib.sha256(identity.encode("utf-8")).digest()[:8], "big") >> 1


def month_of(start_t: float | None, parts: pd.DataFrame) -> str:
    t = start_t
    if t is None and "end_t" in parts and parts["end_t"].notna().any():
        t = float(parts["end_t"].min())
    return datetime.fromtimestamp(t, UTC).strftime("%Y-%m") if t is not None else "unknown"


def from_folder(folder: Path) -> LotExport:
    data = read_folder(folder)
    lot = data.lot
    station, lot_id, start_time, _, limits_sha = lot_key_values(lot)
    start_t = lot.get("start_t") if isinstance(lot.get("start_t"), int | float) else None
    end_t = lot.get("end_t") if isinstance(lot.get("end_t"), int | float) else None
    bins = pd.DataFrame([(kind[:4], int(n), str(info.get("name", "")), bool(info.get("pass", False)))
                         for kind in ("hard_bins", "soft_bins") for n, info in (lot.get(kind) or {}).items()],
                        columns=["kind", "bin", "name", "passing"])
    return LotExport(
        {"lot_key": lot_uid(lot), "station": station, "lot_id": lot_id, "product": str(lot.get("product") or ""),
         "start_t": start_t, "end_t": end_t, "start_time": start_time, "limits_sha256": limits_sha,
         "complete": bool(lot.get("complete", False)), "header": json.dumps(lot)},
        bins, [(sha, kind, text) for kind, (sha, text) in data.files.items()],
        part_frame(data.parts), result_frame(data.results))


def from_store(conn) -> Iterator[LotExport]:
    """Every lot of the store (a psycopg connection), one at a time."""
    from station.store.engines import postgres_engine

    run = postgres_engine(conn).run
    lots = run("SELECT l.lot_key AS store_key, l.header, s.name AS station, l.product, l.start_t, l.end_t, "
               "l.complete FROM lots l JOIN stations s USING (station_key) ORDER BY l.lot_key", [])
    for row in lots.itertuples():
        header = row.header if isinstance(row.header, dict) else {}
        station, lot_id, start_time, _, limits_sha = lot_key_values(header)
        parts = run("SELECT part_seq, part_id, head_num, site_num, hard_bin, soft_bin, grade, pass, test_t, "
                    "retest, fail_test, fault, end_t FROM parts WHERE lot_key = %s ORDER BY part_seq", [row.store_key])
        results = run("SELECT part_seq, test_num, test_txt, param, region, vcm, cond, result, units, lo_limit, "
                      "hi_limit, pass, grade FROM results WHERE lot_key = %s ORDER BY part_seq, test_num",
                      [row.store_key])
        bins = run("SELECT kind, bin, name, passing FROM bins WHERE lot_key = %s ORDER BY kind, bin", [row.store_key])
        files = run("SELECT f.sha256, f.kind, f.content FROM applied_files f WHERE f.sha256 IN (%s, %s, %s)",
                    [str((header.get(k) or {}).get("sha256") or "") for k in ("sequence", "limits", "bench")])
        yield LotExport(
            {"lot_key": lot_uid(header), "station": station, "lot_id": lot_id, "product": row.product,
             "start_t": _float(row.start_t), "end_t": _float(row.end_t), "start_time": start_time,
             "limits_sha256": limits_sha, "complete": bool(row.complete), "header": json.dumps(header)},
            bins, [(str(r.sha256), str(r.kind), str(r.content)) for r in files.itertuples()],
            _typed_parts(parts), _typed_results(results))


def _float(value: object) -> float | None:
    return None if value is None or pd.isna(value) else float(value)   # type: ignore[arg-type]


def _typed_parts(frame: pd.DataFrame) -> pd.DataFrame:
    frame = frame.copy()
    for column in ("pass",):
        frame[column] = frame[column].astype("Int16")
    frame["fail_test"] = frame["fail_test"].astype("Int64")
    for column in ("test_t", "end_t"):
        frame[column] = frame[column].astype(float)
    return frame


def _typed_results(frame: pd.DataFrame) -> pd.DataFrame:
    frame = frame.copy()
    frame["pass"] = frame["pass"].astype("Int16")
    for column in ("vcm", "cond", "result", "lo_limit", "hi_limit"):
        frame[column] = frame[column].astype(float)
    return frame


PART_SCHEMA = pa.schema([("lot_key", pa.int64()), ("part_seq", pa.int32()), ("part_id", pa.string()),
                         ("head_num", pa.int16()), ("site_num", pa.int16()), ("hard_bin", pa.int32()),
                         ("soft_bin", pa.int32()), ("grade", pa.string()), ("pass", pa.int16()),
                         ("test_t", pa.float64()), ("retest", pa.int16()), ("fail_test", pa.int64()),
                         ("fault", pa.string()), ("end_t", pa.float64())])
RESULT_SCHEMA = pa.schema([("lot_key", pa.int64()), ("part_seq", pa.int32()), ("test_num", pa.int32()),
                           ("test_txt", pa.string()), ("param", pa.string()), ("region", pa.string()),
                           ("vcm", pa.float64()), ("cond", pa.float64()), ("result", pa.float64()),
                           ("units", pa.string()), ("lo_limit", pa.float64()), ("hi_limit", pa.float64()),
                           ("pass", pa.int16()), ("grade", pa.string())])
LOT_SCHEMA = pa.schema([("lot_key", pa.int64()), ("station", pa.string()), ("lot_id", pa.string()),
                        ("product", pa.string()), ("start_t", pa.float64()), ("end_t", pa.float64()),
                        ("start_time", pa.string()), ("limits_sha256", pa.string()), ("complete", pa.bool_()),
                        ("header", pa.string())])


def _write(table: pa.Table, path: Path) -> None:
    """Write through a temporary name, so that a reader never sees half a file."""
    path.parent.mkdir(parents=True, exist_ok=True)
    temporary = path.with_suffix(".parquet.tmp")
    pq.write_table(table, temporary, compression="zstd")
    os.replace(temporary, path)


def partition(product: str, month: str) -> str:
    # Product names are free text: quoted so that one cannot climb out of its folder.
    return f"product={quote(product or 'none', safe='')}/month={month}"


MAX_CHUNKS = 16          # a lot exported in more pieces than this is rewritten as one file


@dataclass
class Written:
    """What one export of a lot wrote."""

    parts: int               # parts in the lot now
    new_parts: int           # of them written by this export
    new_results: int
    rewritten: bool          # the lot's files were replaced (first export, a resumed lot, compaction)


def _chunks(out: Path, table: str, key: int) -> list[Path]:
    """The lot's files of a table: `<key>.parquet` holds its first parts, `<key>-<first seq>.parquet`
    each later piece."""
    return sorted([*(out / table).glob(f"*/*/{key}.parquet"), *(out / table).glob(f"*/*/{key}-*.parquet")])


def _exported_parts(files: list[Path]) -> pd.DataFrame:
    if not files:
        return pd.DataFrame({"part_seq": [], "part_id": [], "end_t": []})
    frames = [pq.read_table(f, columns=["part_seq", "part_id", "end_t"]).to_pandas() for f in files]
    return pd.concat(frames, ignore_index=True).sort_values("part_seq", kind="stable").reset_index(drop=True)


def _agrees(old: pd.DataFrame, new: pd.DataFrame) -> bool:
    """The exported parts are the first rows of the lot as it is now (a resume drops and retests
    an interrupted index, which changes ids or end times)."""
    if len(old) > len(new):
        return False
    head = new.iloc[: len(old)]
    return bool((old["part_seq"].to_numpy() == head["part_seq"].to_numpy()).all()
                and (old["part_id"].astype(str).to_numpy() == head["part_id"].astype(str).to_numpy()).all()
                and pd.Series(old["end_t"].to_numpy()).equals(pd.Series(head["end_t"].to_numpy(), dtype=float)))


def write_lot(out: Path, lot: LotExport) -> Written:
    """Write one lot's files. A lot exported before gets only its new parts, as a further piece,
    when the parts exported then are still its first rows; otherwise its files are replaced."""
    key = int(lot.lot["lot_key"])
    where = partition(lot.lot["product"], month_of(lot.lot["start_t"], lot.parts))
    parts = lot.parts.sort_values("part_seq", kind="stable").reset_index(drop=True)
    parts.insert(0, "lot_key", key)
    results = lot.results.copy()
    results.insert(0, "lot_key", key)
    old_parts, old_results = _chunks(out, "parts", key), _chunks(out, "results", key)
    in_place = all(f.parent.relative_to(out / "parts").as_posix() == where for f in old_parts)
    exported = _exported_parts(old_parts) if in_place else pd.DataFrame()
    grow = bool(old_parts) and in_place and len(old_parts) < MAX_CHUNKS and _agrees(exported, parts)
    if grow:
        new = parts.iloc[len(exported):]
        piece = results.iloc[0:0]
        if len(new):
            first = int(new["part_seq"].iloc[0])
            piece = results[results["part_seq"] >= first]
            # Results before parts, the lot's row last: a reader sees a part only with its results.
            _write(pa.Table.from_pandas(piece, schema=RESULT_SCHEMA, preserve_index=False),
                   out / "results" / where / f"{key}-{first:09d}.parquet")
            _write(pa.Table.from_pandas(new, schema=PART_SCHEMA, preserve_index=False),
                   out / "parts" / where / f"{key}-{first:09d}.parquet")
        written = Written(len(parts), len(new), len(piece), rewritten=False)
    else:
        _write(pa.Table.from_pandas(results, schema=RESULT_SCHEMA, preserve_index=False),
               out / "results" / where / f"{key}.parquet")
        _write(pa.Table.from_pandas(parts, schema=PART_SCHEMA, preserve_index=False),
               out / "parts" / where / f"{key}.parquet")
        keep = {out / "results" / where / f"{key}.parquet", out / "parts" / where / f"{key}.parquet"}
        for stale in [*old_parts, *old_results]:
            if stale not in keep:
                stale.unlink(missing_ok=True)
        written = Written(len(parts), len(parts), len(results), rewritten=True)
    bins = lot.bins.copy()
    bins.insert(0, "lot_key", key)
    _write(pa.Table.from_pandas(bins.astype({"bin": "int32", "passing": bool}), preserve_index=False),
           out / "bins" / f"{key}.parquet")
    for sha, kind, content in lot.files:
        target = out / "applied_files" / f"{sha}.parquet"
        if not target.exists():
            _write(pa.table({"sha256": [sha], "kind": [kind], "content": [content]}), target)
    _write(pa.Table.from_pylist([lot.lot], schema=LOT_SCHEMA), out / "lots" / f"{key}.parquet")   # last: the lot is whole
    return written


def export(out: Path, lots: Iterable[LotExport], progress: Callable[[LotExport, Written], None] | None = None) -> int:
    """Write every lot; returns the result rows written."""
    total = 0
    for lot in lots:
        written = write_lot(out, lot)
        total += written.new_results
        if progress is not None:
            progress(lot, written)
    return total


def open_history(folder: Path):
    """A DuckDB connection with views lot_list, parts, results, bins, applied_files over `folder`."""
    import duckdb

    if not (folder / "lots").is_dir() or not any((folder / "lots").glob("*.parquet")):
        raise DatalogError(f"{folder}: no Parquet history here (lots/*.parquet missing; write it with "
                           "station export --to parquet)")
    conn = duckdb.connect()
    root = str(folder).replace("'", "''")     # a path in a string literal: quotes doubled
    # union_by_name: lot files written before the header column read it as NULL.
    lots = f"read_parquet('{root}/lots/*.parquet', union_by_name = true)"
    columns = {row[0] for row in conn.execute(f"DESCRIBE SELECT * FROM {lots}").fetchall()}
    extra = "" if "header" in columns else ", NULL::VARCHAR AS header"
    conn.execute(f"CREATE VIEW lot_list AS SELECT *{extra} FROM {lots}")
    for name in ("parts", "results"):
        files = list((folder / name).glob("*/*/*.parquet"))
        if files:
            conn.execute(f"CREATE VIEW {name} AS SELECT * FROM read_parquet('{root}/{name}/*/*/*.parquet', "
                         "hive_partitioning = true, union_by_name = true)")
        else:
            schema = PART_SCHEMA if name == "parts" else RESULT_SCHEMA
            conn.register(f"{name}_empty", schema.empty_table())
            conn.execute(f"CREATE VIEW {name} AS SELECT * FROM {name}_empty")
    conn.execute(f"CREATE VIEW bins AS SELECT * FROM read_parquet('{root}/bins/*.parquet')")
    if list((folder / "applied_files").glob("*.parquet")):
        conn.execute(f"CREATE VIEW applied_files AS SELECT * FROM read_parquet('{root}/applied_files/*.parquet')")
    else:
        conn.execute("CREATE VIEW applied_files AS SELECT ''::VARCHAR AS sha256, ''::VARCHAR AS kind, "
                     "''::VARCHAR AS content WHERE false")
    return conn


def parquet_summary(folder: Path, selection: Selection, by: str | None = None):
    from station.store.engines import duckdb_engine

    conn = open_history(folder)
    try:
        return summarise_sql(duckdb_engine(conn), selection, by=by)
    finally:
        conn.close()

"""Fleet-store figures (`python -m benchmarks --store`; not in the default run: they need a
PostgreSQL server and take minutes): publish rate through COPY, the SQL summary of a
synthetic 10 M-row store, and the DuckDB summary of synthetic Parquet history.

The data are synthetic (invented): parts of the demo product with ROWS_PER_PART computed
results each (parameters and regions of the demo limit table, values drawn at random), bins
and grades from the demo table's names. Only the sizes and shapes matter here.
"""

from __future__ import annotations

import hashlib
import json
import os
import subprocess
import time
from pathlib import Path

import numpy as np
import pandas as pd
import pyarrow as pa

from station.demo import DEMO_LIMITS

ROWS_PER_PART = 50
PARTS_PER_LOT = 20_000            # one million result rows per lot
PARAMS = [("vos", ""), ("cmrr", "low"), ("cmrr", "transition"), ("cmrr", "high"), ("aol", ""), ("psrr", ""),
          ("iq", ""), ("vos_worst", "full"), ("cm_step", "transition"), ("vos_cm", "low")]
ROOT = Path(__file__).resolve().parents[1]
PG_SCRIPT = ROOT / "tests" / "support" / "pg_server.sh"


class Server:
    """STATION_BENCH_PG_URL, or a throwaway cluster from tests/support/pg_server.sh."""

    def __init__(self) -> None:
        self.folder: str | None = None
        given = os.environ.get("STATION_BENCH_PG_URL")
        if given:
            self.url = given
            return
        done = subprocess.run(["bash", str(PG_SCRIPT), "start"], capture_output=True, text=True, check=True)
        self.url, self.folder = done.stdout.split()

    def close(self) -> None:
        if self.folder:
            subprocess.run(["bash", str(PG_SCRIPT), "stop", self.folder], capture_output=True)


def synthetic_folder(folder: Path, parts: int, station: str = "bench-s", seed: int = 1) -> int:
    """A datalog folder of `parts` parts (4 sites) with ROWS_PER_PART results each; result rows."""
    rng = np.random.default_rng(seed)
    folder.mkdir(parents=True, exist_ok=True)
    limits_text = DEMO_LIMITS.read_text(encoding="utf-8")
    (folder / "limits.yaml").write_text(limits_text, encoding="utf-8")
    ids = np.array([f"S{n:08d}" for n in range(parts)], dtype=object)
    site = np.arange(parts) % 4 + 1
    good = rng.random(parts) < 0.9
    pass_ = np.where(good, "1", "0")
    start = 1_796_061_600.0
    part_frame = pd.DataFrame({
        "LOT_ID": "SYN-1", "PART_ID": ids, "HEAD_NUM": 1, "SITE_NUM": site,
        "HARD_BIN": np.where(good, 1, 5), "SOFT_BIN": np.where(good, 1, 12), "GRADE": np.where(good, "A", ""),
        "PASS": pass_, "TEST_T": 800, "RETEST": 0, "FAIL_TEST": np.where(good, "", "3001"), "FAULT": "",
        "END_T": start + 0.2 * (np.arange(parts) // 4 + 1)})
    n = parts * ROWS_PER_PART
    k = np.tile(np.arange(ROWS_PER_PART), parts)
    param = np.array([PARAMS[i % len(PARAMS)][0] for i in range(ROWS_PER_PART)], dtype=object)[k]
    region = np.array([PARAMS[i % len(PARAMS)][1] for i in range(ROWS_PER_PART)], dtype=object)[k]
    result_frame = pd.DataFrame({
        "LOT_ID": "SYN-1", "PART_ID": np.repeat(ids, ROWS_PER_PART), "HEAD_NUM": 1,
        "SITE_NUM": np.repeat(site, ROWS_PER_PART), "TEST_NUM": 1001 + k, "TEST_TXT": "synthetic",
        "PARAM": param, "REGION": region, "VCM": 0.0, "COND": "", "RESULT": rng.normal(0.0, 1e-5, n),
        "UNITS": "V", "LO_LIMIT": -5e-5, "HI_LIMIT": 5e-5, "PASS": np.repeat(pass_, ROWS_PER_PART),
        "GRADE": "A"})
    part_frame.to_csv(folder / "parts.csv", index=False)
    result_frame.to_csv(folder / "results.csv", index=False)
    sha = hashlib.sha256(limits_text.encode()).hexdigest()
    (folder / "lot.json").write_text(json.dumps({
        "format": "ampscreen-datalog/1", "lot_id": "SYN-1", "station": station, "operator": "bench",
        "mode": "dry-run", "product": "PX-401", "start_time": "2026-11-30T18:00:00Z", "start_t": start,
        "end_t": float(part_frame["END_T"].max()), "complete": True, "parts_tested": parts,
        "limits": {"file": "limits.yaml", "sha256": sha}, "sequence": {"file": "sequence.yaml", "sha256": "0" * 64},
        "hard_bins": {"1": {"name": "Grade A", "pass": True}, "5": {"name": "Parametric fail", "pass": False}},
        "soft_bins": {"1": {"name": "Grade A", "pass": True}, "12": {"name": "CMRR low region", "pass": False}},
    }), encoding="utf-8")
    return n


def ingest(url: str, work: Path, parts: int) -> dict:
    """Publish one synthetic folder into an empty store: rows per second, read included and not."""
    from station.store.connect import connect
    from station.store.publish import publish_folder, read_folder
    from station.store.schema import migrate

    rows = synthetic_folder(work / "ingest", parts)
    with connect(url, autocommit=True) as conn:
        migrate(conn, "bench")
        t0 = time.perf_counter()
        data = read_folder(work / "ingest")
        t1 = time.perf_counter()
        publish_folder(conn, data, batch_parts=parts)      # one COPY per table
        t2 = time.perf_counter()
    return {"store_ingest_rows": rows, "store_ingest_rows_per_s": rows / (t2 - t1),
            "store_publish_rows_per_s_with_read": rows / (t2 - t0)}


def fill_store(url: str, rows: int) -> None:
    """A synthetic store of `rows` result rows, made inside PostgreSQL (generate_series)."""
    from station.store.connect import connect

    limits_text = DEMO_LIMITS.read_text(encoding="utf-8")
    sha = hashlib.sha256(limits_text.encode()).hexdigest()
    parts_total = rows // ROWS_PER_PART
    lots = max(parts_total // PARTS_PER_LOT, 1)
    per_lot = parts_total // lots
    params = ", ".join(f"'{p}'" for p, _ in PARAMS)       # constants of this module
    regions = ", ".join(f"'{r}'" for _, r in PARAMS)
    with connect(url, autocommit=True) as conn:
        conn.execute("INSERT INTO stations (name) SELECT 'bench-' || g FROM generate_series(1, 4) g")
        conn.execute("INSERT INTO applied_files VALUES (%s, 'limits', %s)", (sha, limits_text))
        conn.execute(f"""INSERT INTO lots (station_key, lot_id, start_time, sequence_sha256, limits_sha256,
                             bench_sha256, start_t, end_t, product, operator, mode, complete, header)
                         SELECT 1 + mod(g, 4), 'SYN-' || g, '', '', %s, '', 1796061600 + g * 3600.0,
                                1796061600 + g * 3600.0 + 3000, 'PX-401', 'bench', 'run', true, '{{}}'
                         FROM generate_series(1, {lots}) g""", (sha,))
        conn.execute("""INSERT INTO bins SELECT lot_key, kind, bin, name, passing FROM lots,
                        (VALUES ('hard', 1, 'Grade A', true), ('hard', 5, 'Parametric fail', false),
                                ('soft', 1, 'Grade A', true), ('soft', 12, 'CMRR low region', false)) b(kind, bin, name, passing)""")
        conn.execute(f"""INSERT INTO parts SELECT l.lot_key, s, 'S' || s, 1, 1 + s % 4,
                             CASE WHEN s % 10 = 0 THEN 5 ELSE 1 END, CASE WHEN s % 10 = 0 THEN 12 ELSE 1 END,
                             CASE WHEN s % 10 = 0 THEN '' ELSE 'A' END, CASE WHEN s % 10 = 0 THEN 0 ELSE 1 END,
                             800, 0, NULL, '', l.start_t + 0.2 * (s / 4 + 1)
                         FROM lots l, generate_series(0, {per_lot - 1}) s""")
        conn.execute(f"""INSERT INTO results SELECT p.lot_key, p.part_seq, 1001 + k, 'synthetic',
                             (ARRAY[{params}])[1 + k % {len(PARAMS)}], (ARRAY[{regions}])[1 + k % {len(PARAMS)}],
                             0, NULL, (random() - 0.5) * 1e-4, 'V', -5e-5, 5e-5, p.pass, 'A'
                         FROM parts p, generate_series(0, {ROWS_PER_PART - 1}) k""")
        conn.execute("VACUUM ANALYZE")


def store_summary(url: str, rows: int, repeats: int) -> dict:
    from station.store.connect import connect
    from station.store.engines import postgres_engine
    from station.store.schema import migrate
    from station.store.summary_sql import Selection, summarise_sql

    with connect(url, autocommit=True) as conn:
        migrate(conn, "bench")
    t0 = time.perf_counter()
    fill_store(url, rows)
    fill_s = time.perf_counter() - t0
    times = []
    with connect(url, autocommit=True) as conn:
        count = conn.execute("SELECT count(*) FROM results").fetchone()
        for _ in range(repeats):
            t = time.perf_counter()
            summarise_sql(postgres_engine(conn), Selection(), by="station")
            times.append(time.perf_counter() - t)
    rows_in = int(count[0]) if count else 0
    key = "store_summary_10m_rows_s" if rows_in >= 10_000_000 else "store_summary_rows_s"
    return {"store_summary_rows": rows_in, key: min(times), "store_summary_runs_s": times, "store_fill_s": fill_s}


def write_history(out: Path, rows: int, seed: int = 2) -> int:
    """Synthetic Parquet history (the layout of station/store/parquet.py) of `rows` result rows."""
    from station.store import parquet

    rng = np.random.default_rng(seed)
    limits_text = DEMO_LIMITS.read_text(encoding="utf-8")
    sha = hashlib.sha256(limits_text.encode()).hexdigest()
    parquet._write(pa.table({"sha256": [sha], "kind": ["limits"], "content": [limits_text]}),
                   out / "applied_files" / f"{sha}.parquet")
    per_lot = PARTS_PER_LOT
    lots = max(rows // (per_lot * ROWS_PER_PART), 1)
    k = np.tile(np.arange(ROWS_PER_PART, dtype=np.int32), per_lot)
    seq = np.repeat(np.arange(per_lot, dtype=np.int32), ROWS_PER_PART)
    param = pa.array([PARAMS[i % len(PARAMS)][0] for i in range(ROWS_PER_PART)]).take(pa.array(k))
    region = pa.array([PARAMS[i % len(PARAMS)][1] for i in range(ROWS_PER_PART)]).take(pa.array(k))
    fail = np.arange(per_lot) % 10 == 0
    written = 0
    for lot in range(lots):
        key = 1_000_000 + lot
        start = 1_780_000_000.0 + lot * 86_400.0 * 3      # lots spread over months
        month = parquet.month_of(start, pd.DataFrame())
        where = parquet.partition("PX-401", month)
        pass_ = pa.array(np.where(fail, 0, 1).astype(np.int16))
        parquet._write(pa.table({
            "lot_key": pa.array(np.full(per_lot, key, dtype=np.int64)), "part_seq": pa.array(np.arange(per_lot, dtype=np.int32)),
            "part_id": pa.array([f"S{n}" for n in range(per_lot)]), "head_num": pa.array(np.ones(per_lot, np.int16)),
            "site_num": pa.array((np.arange(per_lot) % 4 + 1).astype(np.int16)),
            "hard_bin": pa.array(np.where(fail, 5, 1).astype(np.int32)),
            "soft_bin": pa.array(np.where(fail, 12, 1).astype(np.int32)),
            "grade": pa.array(np.where(fail, "", "A")), "pass": pass_,
            "test_t": pa.array(np.full(per_lot, 800.0)), "retest": pa.array(np.zeros(per_lot, np.int16)),
            "fail_test": pa.nulls(per_lot, pa.int64()), "fault": pa.array([""] * per_lot),
            "end_t": pa.array(start + 0.2 * (np.arange(per_lot) // 4 + 1))}, schema=parquet.PART_SCHEMA),
            out / "parts" / where / f"{key}.parquet")
        n = per_lot * ROWS_PER_PART
        parquet._write(pa.table({
            "lot_key": pa.array(np.full(n, key, dtype=np.int64)), "part_seq": pa.array(seq),
            "test_num": pa.array(1001 + k), "test_txt": pa.array(["synthetic"] * n), "param": param,
            "region": region, "vcm": pa.array(np.zeros(n)), "cond": pa.nulls(n, pa.float64()),
            "result": pa.array(rng.normal(0.0, 1e-5, n)), "units": pa.array(["V"] * n),
            "lo_limit": pa.array(np.full(n, -5e-5)), "hi_limit": pa.array(np.full(n, 5e-5)),
            "pass": pa.array(np.repeat(np.where(fail, 0, 1).astype(np.int16), ROWS_PER_PART)),
            "grade": pa.array(["A"] * n)}, schema=parquet.RESULT_SCHEMA), out / "results" / where / f"{key}.parquet")
        parquet._write(pa.table({"lot_key": [key, key, key, key], "kind": ["hard", "hard", "soft", "soft"],
                                 "bin": pa.array([1, 5, 1, 12], pa.int32()),
                                 "name": ["Grade A", "Parametric fail", "Grade A", "CMRR low region"],
                                 "passing": [True, False, True, False]}), out / "bins" / f"{key}.parquet")
        parquet._write(pa.Table.from_pylist([{
            "lot_key": key, "station": f"bench-{lot % 4 + 1}", "lot_id": f"SYN-{lot}", "product": "PX-401",
            "start_t": start, "end_t": start + 4000.0, "start_time": "", "limits_sha256": sha, "complete": True}],
            schema=parquet.LOT_SCHEMA), out / "lots" / f"{key}.parquet")
        written += n
    return written


def parquet_summary(work: Path, rows: int, repeats: int) -> dict:
    from station.store.parquet import parquet_summary as summarise
    from station.store.summary_sql import Selection

    out = work / "history"
    t0 = time.perf_counter()
    written = write_history(out, rows)
    write_s = time.perf_counter() - t0
    size = sum(f.stat().st_size for f in out.rglob("*.parquet"))
    times = []
    for _ in range(repeats):
        t = time.perf_counter()
        summarise(out, Selection(), by="station")
        times.append(time.perf_counter() - t)
    key = "parquet_summary_100m_rows_s" if written >= 100_000_000 else "parquet_summary_rows_s"
    return {"parquet_rows": written, key: min(times), "parquet_summary_runs_s": times,
            "parquet_bytes": size, "parquet_write_s": write_s}


def store_figures(work: Path, ingest_parts: int, store_rows: int, parquet_rows: int, repeats: int) -> dict:
    import psycopg

    server = Server()
    figures: dict = {}
    try:
        with psycopg.connect(server.url, autocommit=True) as conn:
            for name in ("bench_ingest", "bench_summary", "bench_live"):
                conn.execute(f"DROP DATABASE IF EXISTS {name}")
                conn.execute(f"CREATE DATABASE {name}")
        base = server.url.rsplit("/", 1)[0]
        figures.update(ingest(base + "/bench_ingest", work, ingest_parts))
        figures.update(store_summary(base + "/bench_summary", store_rows, repeats))
        figures.update(live_sink(base + "/bench_live", work, parts=16 if repeats == 1 else 32))
    finally:
        server.close()
    figures.update(parquet_summary(work, parquet_rows, repeats))
    return figures


def _lot_test_time(work: Path, name: str, parts: int, store: str | None) -> float:
    """Mean handler-index test time (TEST_T, ms) of a dry-run lot, with or without the sink."""
    import sys

    out = work / name
    command = [sys.executable, "-m", "station.cli", "dry-run", "--parts", str(parts), "--seed", "5",
               "--out", str(out), "--lot", name.upper(), "--force"]
    if store is not None:
        command += ["--store", store]
    subprocess.run(command, capture_output=True, text=True, check=True, cwd=ROOT,
                   env={**os.environ, "PYTHONPATH": str(ROOT)})
    frame = pd.read_csv(out / "parts.csv")
    return float(frame.drop_duplicates(["TEST_T", "END_T"])["TEST_T"].iloc[1:].mean())


def live_sink(url: str, work: Path, parts: int) -> dict:
    """Test time of the same simulated lot (speed 1) with no store, with the sink publishing,
    and with the sink's store down (a loopback port nobody listens on: connection refused)."""
    import socket

    from station.store.connect import connect
    from station.store.schema import migrate

    with connect(url, autocommit=True) as conn:
        migrate(conn, "bench")
    with socket.socket() as s:
        s.bind(("127.0.0.1", 0))
        dead = f"postgresql://station@127.0.0.1:{s.getsockname()[1]}/none"
    plain = _lot_test_time(work, "plain", parts, None)
    up = _lot_test_time(work, "up", parts, url)
    down = _lot_test_time(work, "down", parts, dead)
    return {"live_sink_index_ms_no_store": plain, "live_sink_index_ms_store_up": up,
            "live_sink_index_ms_store_down": down, "live_sink_ratio_store_down": down / plain,
            "live_sink_ratio_store_up": up / plain}

"""The store benchmark's synthetic data (benchmarks/store_speed.py) are what the figures claim:
so many rows, summarised by the real code. Run tiny: checked, never timed."""

from __future__ import annotations

from pathlib import Path

import psycopg
import pytest

from benchmarks.store_speed import PARTS_PER_LOT, ROWS_PER_PART, fill_store, ingest, write_history
from station.store.connect import connect
from station.store.engines import postgres_engine
from station.store.parquet import parquet_summary
from station.store.summary_sql import Selection, summarise_sql


def test_ingest_publishes_every_synthetic_row(store_url: str, tmp_path: Path) -> None:
    figures = ingest(store_url, tmp_path, parts=40)
    assert figures["store_ingest_rows"] == 40 * ROWS_PER_PART and figures["store_ingest_rows_per_s"] > 0
    with psycopg.connect(store_url) as conn:
        assert conn.execute("SELECT count(*) FROM results").fetchone() == (40 * ROWS_PER_PART,)


def test_synthetic_store_and_history_hold_the_rows_they_claim(store: str, tmp_path: Path) -> None:
    rows = PARTS_PER_LOT * ROWS_PER_PART          # one lot
    fill_store(store, rows)
    with connect(store, autocommit=True) as conn:
        summary = summarise_sql(postgres_engine(conn), Selection())
    assert summary.overview["parts tested"] == PARTS_PER_LOT
    assert summary.overview["yield"] == pytest.approx(0.9)     # every tenth part fails, by construction
    computed = rows * 9 // 10         # one of the ten synthetic parameters is a raw sweep point (vos_cm)
    assert int(summary.stats["count"].sum()) == computed
    assert write_history(tmp_path / "h", rows) == rows
    history = parquet_summary(tmp_path / "h", Selection())
    assert history.overview["parts tested"] == PARTS_PER_LOT
    assert int(history.stats["count"].sum()) == computed

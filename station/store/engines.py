"""The two engines the SQL summary runs on: the PostgreSQL store and DuckDB over Parquet."""

from __future__ import annotations

from typing import TYPE_CHECKING

import pandas as pd

from station.store.summary_sql import Engine

if TYPE_CHECKING:
    import duckdb
    import psycopg

PG_FINITE = "r.result <> 'Infinity'::float8 AND r.result <> '-Infinity'::float8 AND r.result <> 'NaN'::float8"
DUCKDB_FINITE = "isfinite(r.result)"


def postgres_engine(conn: psycopg.Connection) -> Engine:
    def run(sql: str, params: list) -> pd.DataFrame:
        with conn.cursor() as cur:
            cur.execute(sql, params)   # the text is the module's; filters are parameters
            columns = [d.name for d in cur.description or []]
            return pd.DataFrame(cur.fetchall(), columns=columns)

    return Engine(run, PG_FINITE, "store", "SELECT lot_key, header::text AS header FROM lots")


def duckdb_engine(conn: duckdb.DuckDBPyConnection) -> Engine:
    def run(sql: str, params: list) -> pd.DataFrame:
        return conn.execute(sql.replace("%s", "?"), params).df()

    return Engine(run, DUCKDB_FINITE, "Parquet history", "SELECT lot_key, header FROM lot_list")

"""The store's tables, as numbered migrations; `station store init` applies the missing ones.

A store records its version in `store_version` (one row per migration applied). The station
refuses a store whose version is newer than the migrations it knows (a newer station wrote
it: upgrade this one), and writes to a store only at exactly its own version.

Keys that make every write idempotent: a station by name; a lot by (station, lot id, start
time, SHA-256 of the sequence and of the limit table it was run with); a part by (lot, row
number in parts.csv); a result by (lot, part row, test number); bins by (lot, kind, number);
an applied file by its SHA-256.
"""

from __future__ import annotations

import psycopg

from station.store.connect import StoreRefused

MIGRATIONS: tuple[str, ...] = (
    # 1: the first schema.
    """
    CREATE TABLE store_version (
        version integer PRIMARY KEY,
        applied_at timestamptz NOT NULL DEFAULT now(),
        software text NOT NULL
    );
    CREATE TABLE stations (
        station_key serial PRIMARY KEY,
        name text NOT NULL UNIQUE
    );
    CREATE TABLE applied_files (
        sha256 text PRIMARY KEY,
        kind text NOT NULL,
        content text NOT NULL
    );
    CREATE TABLE lots (
        lot_key bigserial PRIMARY KEY,
        station_key integer NOT NULL REFERENCES stations,
        lot_id text NOT NULL,
        start_time text NOT NULL,
        sequence_sha256 text NOT NULL,
        limits_sha256 text NOT NULL,
        bench_sha256 text NOT NULL,
        start_t double precision,
        end_t double precision,
        product text NOT NULL,
        operator text NOT NULL,
        mode text NOT NULL,
        complete boolean NOT NULL,
        header jsonb NOT NULL,
        published_at timestamptz NOT NULL DEFAULT now(),
        UNIQUE (station_key, lot_id, start_time, sequence_sha256, limits_sha256)
    );
    CREATE INDEX lots_product ON lots (product);
    CREATE TABLE bins (
        lot_key bigint NOT NULL REFERENCES lots ON DELETE CASCADE,
        kind text NOT NULL CHECK (kind IN ('hard', 'soft')),
        bin integer NOT NULL,
        name text NOT NULL,
        passing boolean NOT NULL,
        PRIMARY KEY (lot_key, kind, bin)
    );
    CREATE TABLE limits_applied (
        lot_key bigint NOT NULL REFERENCES lots ON DELETE CASCADE,
        grade_rank integer NOT NULL,
        grade text NOT NULL,
        param text NOT NULL,
        region text NOT NULL,
        lsl double precision,
        usl double precision,
        units text NOT NULL,
        PRIMARY KEY (lot_key, grade, param, region)
    );
    CREATE TABLE parts (
        lot_key bigint NOT NULL REFERENCES lots ON DELETE CASCADE,
        part_seq integer NOT NULL,
        part_id text NOT NULL,
        head_num smallint NOT NULL,
        site_num smallint NOT NULL,
        hard_bin integer NOT NULL,
        soft_bin integer NOT NULL,
        grade text NOT NULL,
        pass smallint,
        test_t double precision,
        retest smallint NOT NULL,
        fail_test integer,
        fault text NOT NULL,
        end_t double precision,
        PRIMARY KEY (lot_key, part_seq)
    );
    CREATE INDEX parts_end_t ON parts (end_t);
    -- No foreign key to parts: a publish writes a part and its results in one transaction,
    -- and a per-row key check would halve the COPY rate.
    CREATE TABLE results (
        lot_key bigint NOT NULL,
        part_seq integer NOT NULL,
        test_num integer NOT NULL,
        test_txt text NOT NULL,
        param text NOT NULL,
        region text NOT NULL,
        vcm double precision,
        cond double precision,
        result double precision NOT NULL,
        units text NOT NULL,
        lo_limit double precision,
        hi_limit double precision,
        pass smallint,
        grade text NOT NULL,
        PRIMARY KEY (lot_key, part_seq, test_num)
    );
    CREATE TABLE alarms (
        lot_key bigint NOT NULL REFERENCES lots ON DELETE CASCADE,
        seq integer NOT NULL,
        kind text NOT NULL,
        message text NOT NULL,
        PRIMARY KEY (lot_key, seq)
    );
    CREATE VIEW lot_list AS
        SELECT l.lot_key, s.name AS station, l.lot_id, l.product, l.start_t, l.end_t, l.limits_sha256
        FROM lots l JOIN stations s USING (station_key);
    """,
    # 2: the summary's statistics read results in (param, region, value) order from this index
    # alone (an index-only scan gives the percentiles' groups presorted): 10 M rows in a few
    # seconds instead of a full sort. It costs some COPY rate.
    """
    CREATE INDEX results_by_parameter ON results (param, region, result) INCLUDE (lot_key, units);
    """,
)

CODE_VERSION = len(MIGRATIONS)


def store_version(conn: psycopg.Connection) -> int:
    """The store's schema version; 0 for an empty database."""
    exists = conn.execute("SELECT to_regclass('store_version') IS NOT NULL").fetchone()
    if not exists or not exists[0]:
        return 0
    row = conn.execute("SELECT coalesce(max(version), 0) FROM store_version").fetchone()
    return int(row[0]) if row else 0


def _refuse_newer(version: int, where: str) -> None:
    if version > CODE_VERSION:
        raise StoreRefused(f"{where}: the store is at schema version {version}, newer than this station knows "
                           f"({CODE_VERSION}); upgrade the station software (nothing was changed)")


def migrate(conn: psycopg.Connection, where: str) -> tuple[int, int]:
    """Apply the missing migrations in one transaction; (version before, version after)."""
    from station import __version__

    with conn.transaction():
        # One initialiser at a time: two `store init` at once must not both create the tables.
        conn.execute("SELECT pg_advisory_xact_lock(7261201)")
        before = store_version(conn)
        _refuse_newer(before, where)
        for number in range(before + 1, CODE_VERSION + 1):
            conn.execute(MIGRATIONS[number - 1])
            conn.execute("INSERT INTO store_version (version, software) VALUES (%s, %s)",
                         (number, f"ampscreen-station {__version__}"))
    return before, CODE_VERSION


def require_current(conn: psycopg.Connection, where: str) -> None:
    """Refuse a store that is not at this station's schema version (before any read or write)."""
    version = store_version(conn)
    _refuse_newer(version, where)
    if version < CODE_VERSION:
        raise StoreRefused(f"{where}: the store is at schema version {version}, this station needs "
                           f"{CODE_VERSION} (run: station store init URL)")

"""`station store init`: versioned migrations; a newer store is refused, untouched."""

from __future__ import annotations

import psycopg
from click.testing import CliRunner

from station.cli.main import main
from station.store.schema import CODE_VERSION


def test_init_creates_the_tables_then_is_a_no_op(store_url: str) -> None:
    runner = CliRunner()
    first = runner.invoke(main, ["store", "init", store_url])
    assert first.exit_code == 0, first.output
    assert f"schema version 0 -> {CODE_VERSION}" in first.output
    again = runner.invoke(main, ["store", "init", store_url])
    assert again.exit_code == 0 and "up to date" in again.output
    with psycopg.connect(store_url) as conn:
        tables = {r[0] for r in conn.execute(
            "SELECT table_name FROM information_schema.tables WHERE table_schema = 'public'")}
        versions = conn.execute("SELECT version FROM store_version").fetchall()
    assert {"stations", "lots", "parts", "results", "bins", "limits_applied", "alarms",
            "applied_files"} <= tables
    assert versions == [(v,) for v in range(1, CODE_VERSION + 1)]


def test_a_store_newer_than_the_code_is_refused(store: str, tmp_path) -> None:
    with psycopg.connect(store) as conn:
        conn.execute("INSERT INTO store_version (version, software) VALUES (%s, 'future')", (CODE_VERSION + 1,))
    runner = CliRunner()
    init = runner.invoke(main, ["store", "init", store])
    assert init.exit_code == 2
    assert f"schema version {CODE_VERSION + 1}, newer than this station knows" in init.output
    from tests.support.review_datalogs import make_datalog

    folder = make_datalog(tmp_path / "lot", None)
    publish = runner.invoke(main, ["publish", str(folder), "--store", store])
    assert publish.exit_code == 2 and "newer than this station knows" in publish.output
    with psycopg.connect(store) as conn:
        assert conn.execute("SELECT count(*) FROM parts").fetchone() == (0,)


def test_publish_to_an_empty_database_says_to_init(store_url: str, tmp_path) -> None:
    from tests.support.review_datalogs import make_datalog

    folder = make_datalog(tmp_path / "lot", None)
    result = CliRunner().invoke(main, ["publish", str(folder), "--store", store_url])
    assert result.exit_code == 2 and "run: station store init URL" in result.output


def test_an_older_store_is_migrated_and_refused_until_then(store_url: str, tmp_path) -> None:
    from station.store.schema import MIGRATIONS
    from tests.support.review_datalogs import make_datalog

    with psycopg.connect(store_url) as conn:       # a store made by a station of schema version 1
        conn.execute(MIGRATIONS[0])
        conn.execute("INSERT INTO store_version (version, software) VALUES (1, 'older station')")
    folder = make_datalog(tmp_path / "lot", None)
    runner = CliRunner()
    before = runner.invoke(main, ["publish", str(folder), "--store", store_url])
    assert before.exit_code == 2 and f"this station needs {CODE_VERSION}" in before.output
    init = runner.invoke(main, ["store", "init", store_url])
    assert init.exit_code == 0 and f"schema version 1 -> {CODE_VERSION}" in init.output
    assert runner.invoke(main, ["publish", str(folder), "--store", store_url]).exit_code == 0
    with psycopg.connect(store_url) as conn:
        index = conn.execute("SELECT count(*) FROM pg_indexes WHERE indexname = 'results_by_parameter'").fetchone()
    assert index == (1,)

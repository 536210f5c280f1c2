"""The live sink (`station dry-run ... --store URL`): parts reach the store while the lot
runs; with the store down the lot still ends normally and the backlog is published later."""

from __future__ import annotations

import os
import subprocess
import sys
import time
from pathlib import Path

import psycopg

from tests.store.test_store_publish import _publish, assert_store_mirrors

ROOT = Path(__file__).resolve().parents[2]


def _dry_run(out: Path, store: str, parts: int = 12, speed: str = "1000") -> subprocess.Popen:
    env = {**os.environ, "PYTHONPATH": str(ROOT), "COLUMNS": "400"}    # no wrapped lines
    return subprocess.Popen([sys.executable, "-m", "station.cli", "dry-run", "--parts", str(parts), "--speed", speed,
                             "--seed", "3", "--out", str(out), "--lot", "LIVE-1", "--store", store],
                            env=env, stdout=subprocess.PIPE, stderr=subprocess.STDOUT, text=True)


def test_live_sink_publishes_every_part_of_the_lot(store: str, tmp_path: Path) -> None:
    out = tmp_path / "lot"
    process = _dry_run(out, store)
    output, _ = process.communicate(timeout=120)
    assert process.returncode == 0, output
    assert "12 part(s) of this lot published" in output
    assert_store_mirrors(store, out)
    with psycopg.connect(store) as conn:
        row = conn.execute("SELECT complete FROM lots").fetchone()
    assert row == (True,)          # the last publish came after the lot's end was written


def test_store_down_mid_lot_the_lot_goes_on_and_the_backlog_arrives(pg_server, store: str, tmp_path: Path) -> None:
    out = tmp_path / "lot"
    process = _dry_run(out, store, parts=24, speed="20")
    stopped = False
    try:
        deadline = time.monotonic() + 90
        with psycopg.connect(store, autocommit=True) as conn:
            while time.monotonic() < deadline and process.poll() is None:
                row = conn.execute("SELECT count(*) FROM parts").fetchone()
                if row and row[0] > 0:
                    break
                time.sleep(0.05)
        pg_server.stop()
        stopped = True
        output, _ = process.communicate(timeout=120)
    finally:
        if stopped:
            pg_server.start()
    assert process.returncode == 0, output      # the lot ran to its end with the store down
    assert "cannot publish" in output and "not every part is published" in output
    with psycopg.connect(store) as conn:
        row = conn.execute("SELECT count(*) FROM parts").fetchone()
    assert row is not None and 0 < row[0] < 24
    later = _publish(store, out)
    assert later.exit_code == 0, later.output
    assert_store_mirrors(store, out)

"""`station publish`: repeated, interrupted, with the server down, four at once: every part of
every folder exactly once in the store, with all of its result rows."""

from __future__ import annotations

import os
import signal
import subprocess
import sys
import time
from pathlib import Path

import psycopg
import pytest
from click.testing import CliRunner

from station.cli.main import main
from station.review.load import read_datalog_folder
from station.store.connect import connect
from station.store.publish import publish_folder, read_folder
from tests.support.review_datalogs import LotSpec, hold_back_last_index, make_datalog

ROOT = Path(__file__).resolve().parents[2]


def _publish(store: str, *folders: Path, extra: tuple[str, ...] = ()):
    return CliRunner().invoke(main, ["publish", *map(str, folders), "--store", store, *extra])


def assert_store_mirrors(store: str, *folders: Path) -> None:
    """Each folder's parts exactly once (same ids in the same order) and all their results."""
    with psycopg.connect(store) as conn:
        for folder in folders:
            lot, parts, results, _ = read_datalog_folder(folder)
            rows = conn.execute(
                "SELECT p.part_seq, p.part_id, p.site_num, p.hard_bin FROM parts p JOIN lot_list l USING (lot_key) "
                "WHERE l.station = %s AND l.lot_id = %s ORDER BY p.part_seq",
                (lot["station"], lot["lot_id"])).fetchall()
            assert [r[0] for r in rows] == list(range(len(parts)))
            assert [r[1] for r in rows] == parts["PART_ID"].tolist()
            assert [r[3] for r in rows] == parts["HARD_BIN"].tolist()
            count = conn.execute(
                "SELECT count(*) FROM results r JOIN lot_list l USING (lot_key) WHERE l.station = %s "
                "AND l.lot_id = %s", (lot["station"], lot["lot_id"])).fetchone()
            assert count == (len(results),)
        dup = conn.execute("SELECT count(*) FROM (SELECT lot_key, part_seq FROM parts GROUP BY 1, 2 "
                           "HAVING count(*) > 1) d").fetchone()
        assert dup == (0,)


def test_publish_twice_adds_nothing_the_second_time(store: str, tmp_path: Path) -> None:
    a = make_datalog(tmp_path / "a", LotSpec(parts=40, lot_id="LOT-A", station="st-1"))
    b = make_datalog(tmp_path / "b", LotSpec(parts=30, lot_id="LOT-B", station="st-2", seed=2))
    first = _publish(store, a, b)
    assert first.exit_code == 0, first.output
    assert "44 part(s) added, 0 already" in first.output      # 40 parts + 4 retests
    second = _publish(store, a, b)
    assert second.exit_code == 0, second.output
    assert "0 part(s) added, 44 already in the store" in second.output
    assert_store_mirrors(store, a, b)
    with psycopg.connect(store) as conn:
        assert conn.execute("SELECT count(*) FROM lots").fetchone() == (2,)
        bins = conn.execute("SELECT count(*) FROM bins").fetchone()
        alarms = conn.execute("SELECT kind, count(*) FROM alarms GROUP BY kind").fetchall()
    assert bins is not None and bins[0] > 0
    assert dict(alarms) == {"tester fault": 6}           # 3 tester faults per lot (LotSpec)


def test_a_failure_mid_upload_loses_only_the_batch_in_flight(store: str, tmp_path: Path) -> None:
    folder = make_datalog(tmp_path / "a", LotSpec(parts=50))
    data = read_folder(folder)

    def crash(done: int) -> None:
        if done >= 20:
            raise RuntimeError("killed")

    with connect(store, autocommit=True) as conn, pytest.raises(RuntimeError):
        publish_folder(conn, data, batch_parts=10, after_batch=crash)
    with psycopg.connect(store) as conn:
        assert conn.execute("SELECT count(*) FROM parts").fetchone() == (20,)
    result = _publish(store, folder, extra=("--batch-parts", "7"))
    assert result.exit_code == 0 and "34 part(s) added, 20 already" in result.output
    assert_store_mirrors(store, folder)


def test_publish_killed_mid_upload_then_published_again(store: str, tmp_path: Path) -> None:
    folder = make_datalog(tmp_path / "a", LotSpec(parts=1500, tester_faults=0))
    env = {**os.environ, "PYTHONPATH": str(ROOT)}
    process = subprocess.Popen([sys.executable, "-m", "station.cli", "publish", str(folder), "--store", store,
                                "--batch-parts", "25"], env=env, stdout=subprocess.PIPE, stderr=subprocess.PIPE)
    deadline = time.monotonic() + 60
    committed = 0
    with psycopg.connect(store, autocommit=True) as conn:
        while time.monotonic() < deadline and process.poll() is None:
            row = conn.execute("SELECT count(*) FROM parts").fetchone()
            committed = row[0] if row else 0
            if committed >= 100:
                break
            time.sleep(0.02)
    process.send_signal(signal.SIGKILL)
    process.wait()
    assert 0 < committed < 1504, "the kill must fall inside the upload"
    result = _publish(store, folder)
    assert result.exit_code == 0, result.output
    assert_store_mirrors(store, folder)


def test_publish_with_the_server_stopped_then_started(pg_server, store: str, tmp_path: Path) -> None:
    folder = make_datalog(tmp_path / "a", LotSpec(parts=20))
    pg_server.stop()
    try:
        down = _publish(store, folder)
        assert down.exit_code == 1
        assert "cannot reach the store postgresql://station@127.0.0.1" in down.output
    finally:
        pg_server.start()
    up = _publish(store, folder)
    assert up.exit_code == 0, up.output
    assert_store_mirrors(store, folder)


def test_four_publishers_at_once(store: str, tmp_path: Path) -> None:
    folders = [make_datalog(tmp_path / f"s{n}", LotSpec(parts=120, lot_id="LOT-SHIFT", station=f"bench-{n}",
                                                         seed=n)) for n in range(4)]
    env = {**os.environ, "PYTHONPATH": str(ROOT)}
    # Each publisher sends its own folder and, to overlap on one lot, its neighbour's too.
    processes = [subprocess.Popen([sys.executable, "-m", "station.cli", "publish", str(folders[n]),
                                   str(folders[(n + 1) % 4]), "--store", store, "--batch-parts", "10"],
                                  env=env, stdout=subprocess.PIPE, stderr=subprocess.PIPE) for n in range(4)]
    outputs = [p.communicate(timeout=120) for p in processes]
    assert all(p.returncode == 0 for p in processes), outputs
    assert_store_mirrors(store, *folders)
    with psycopg.connect(store) as conn:
        assert conn.execute("SELECT count(*) FROM lots").fetchone() == (4,)
        assert conn.execute("SELECT count(*) FROM stations").fetchone() == (4,)


def test_a_folder_rewritten_by_a_resume_replaces_the_rows_it_dropped(store: str, tmp_path: Path) -> None:
    folder = make_datalog(tmp_path / "a", LotSpec(parts=12, tester_faults=0, retests=0))
    assert _publish(store, folder).exit_code == 0
    # A resume drops the last rows and tests those parts again: same ids, new end times.
    for name in ("parts.csv",):
        lines = (folder / name).read_text().splitlines(keepends=True)
        changed = [line.replace(",P00011,", ",P00011,") for line in lines]
        last = changed[-1].rsplit(",", 1)
        changed[-1] = f"{last[0]},{float(last[1]) + 60.0}\n"
        (folder / name).write_text("".join(changed))
    result = _publish(store, folder)
    assert result.exit_code == 0 and "1 replaced" in result.output, result.output
    assert_store_mirrors(store, folder)


def test_an_index_under_test_is_left_for_later(store: str, tmp_path: Path) -> None:
    folder = make_datalog(tmp_path / "a", LotSpec(parts=12, tester_faults=0, retests=0))
    hold_back_last_index(folder)
    result = _publish(store, folder)
    assert result.exit_code == 0 and "8 part(s) added" in result.output and "4 under test" in result.output
    (folder / "in_progress.json").unlink()
    again = _publish(store, folder)
    assert "4 part(s) added, 8 already" in again.output
    assert_store_mirrors(store, folder)

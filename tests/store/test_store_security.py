"""Store security: names full of SQL are stored and filtered verbatim (parameters, never text
built from input); a password in the store URL appears in no output and no file; the
standard libpq service file and PG* variables supply credentials."""

from __future__ import annotations

import json
import os
import re
import subprocess
import sys
from pathlib import Path

import psycopg
from click.testing import CliRunner
from psycopg.conninfo import conninfo_to_dict

from station.cli.main import main
from tests.store.test_store_publish import assert_store_mirrors
from tests.support.review_datalogs import LotSpec, make_datalog

ROOT = Path(__file__).resolve().parents[2]
LOT = "L1'); DROP TABLE parts; --"
STATION = "b1\"; DELETE FROM lots WHERE ''=''; --"
OPERATOR = "Robert'); DROP TABLE stations;--"
PASSWORD = "pw-Zq81-never-shown"


def _with_password(url: str) -> str:
    return url.replace("postgresql://station@", f"postgresql://station:{PASSWORD}@")


def test_sql_in_lot_station_and_operator_names_is_inert(store: str, tmp_path: Path) -> None:
    folder = make_datalog(tmp_path / "a", LotSpec(parts=16, lot_id=LOT, station=STATION))
    header = json.loads((folder / "lot.json").read_text())
    header["operator"] = OPERATOR
    (folder / "lot.json").write_text(json.dumps(header))
    runner = CliRunner()
    assert runner.invoke(main, ["publish", str(folder), "--store", store]).exit_code == 0
    assert_store_mirrors(store, folder)
    with psycopg.connect(store) as conn:
        row = conn.execute("SELECT l.lot_id, s.name, l.operator FROM lots l JOIN stations s USING (station_key)"
                           ).fetchone()
    assert row == (LOT, STATION, OPERATOR)
    found = runner.invoke(main, ["summary", "--store", store, "--station", STATION, "--by", "lot"])
    assert found.exit_code == 0, found.output
    assert re.search(r"parts tested\W+20\W", found.output)           # 16 parts + 4 retests
    other = runner.invoke(main, ["summary", "--store", store, "--station", "x' OR '1'='1", "--product", "' OR 1=1 --"])
    assert other.exit_code == 0, other.output
    assert re.search(r"parts tested\W+0\W", other.output)            # the filter matched nothing
    with psycopg.connect(store) as conn:
        assert conn.execute("SELECT count(*) FROM parts").fetchone() == (20,)
        assert conn.execute("SELECT count(*) FROM stations").fetchone() == (1,)


def test_a_password_in_the_url_never_appears_in_output_or_files(pg_server, store: str, tmp_path: Path) -> None:
    url = _with_password(store)
    env = {**os.environ, "PYTHONPATH": str(ROOT), "COLUMNS": "400"}
    out = tmp_path / "lot"
    outputs = []
    for args in (["dry-run", "--parts", "4", "--speed", "1000", "--out", str(out), "--lot", "PW-1", "--store", url],
                 ["publish", str(out), "--store", url],
                 ["summary", "--store", url, "--by", "station", "--html", str(tmp_path / "report.html")],
                 ["export", "--store", url, "--to", "parquet", str(tmp_path / "history")],
                 ["store", "init", url],
                 ["publish", str(out), "--store", url.replace("/t_", "/no_such_db_")],
                 ["summary", "--store", url + "?sslmode=nonsense"]):
        done = subprocess.run([sys.executable, "-m", "station.cli", *args], env=env, capture_output=True,
                              text=True, timeout=120)
        outputs.append(done.stdout + done.stderr)
    assert "4 part(s) of this lot published" in outputs[0]
    assert "cannot reach the store" in outputs[5]
    assert "store postgresql://station@" in (tmp_path / "report.html").read_text(encoding="utf-8")
    for text in outputs:
        assert PASSWORD not in text
    for path in tmp_path.rglob("*"):
        if path.is_file():
            assert PASSWORD.encode() not in path.read_bytes(), path
    with psycopg.connect(store) as conn:
        headers = conn.execute("SELECT header::text FROM lots").fetchall()
    assert headers and all(PASSWORD not in h[0] for h in headers)


def test_credentials_from_a_service_file_and_pg_variables(store: str, tmp_path: Path) -> None:
    params = conninfo_to_dict(store)
    service = tmp_path / "pg_service.conf"
    service.write_text(f"[floor]\nhost={params['host']}\nport={params['port']}\nuser={params['user']}\n"
                       f"dbname={params['dbname']}\n")
    folder = make_datalog(tmp_path / "a", LotSpec(parts=8))
    env = {**os.environ, "PYTHONPATH": str(ROOT), "PGSERVICEFILE": str(service)}
    done = subprocess.run([sys.executable, "-m", "station.cli", "publish", str(folder), "--store", "service=floor"],
                          env=env, capture_output=True, text=True, timeout=60)
    assert done.returncode == 0, done.stderr
    env = {**os.environ, "PYTHONPATH": str(ROOT), "PGHOST": params["host"], "PGPORT": params["port"],
           "PGUSER": params["user"], "PGDATABASE": params["dbname"]}
    done = subprocess.run([sys.executable, "-m", "station.cli", "publish", str(folder), "--store", ""],
                          env=env, capture_output=True, text=True, timeout=60)
    assert done.returncode == 0 and "12 already in the store" in done.stdout, done.stderr
    assert_store_mirrors(store, folder)

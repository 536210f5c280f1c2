"""A real PostgreSQL for the store tests: a throwaway cluster started by
tests/support/pg_server.sh (as the postgres user when run as root), one fresh database per
test. Without initdb (Debian: apt-get install postgresql) the store tests are skipped, with
that reason; STATION_TEST_PG_URL names a running server to use instead (tests that stop and
start the server are then skipped)."""

from __future__ import annotations

import glob
import os
import subprocess
import uuid
from dataclasses import dataclass
from pathlib import Path

import pytest

SCRIPT = Path(__file__).resolve().parents[1] / "support" / "pg_server.sh"


@dataclass
class PgServer:
    url: str                 # the server's own database
    folder: str | None       # the cluster's folder, when this session started it

    def database(self, name: str) -> str:
        return self.url.rsplit("/", 1)[0] + "/" + name

    def _ctl(self, action: str) -> None:
        if self.folder is None:
            pytest.skip("the server was given by STATION_TEST_PG_URL: this test cannot stop and start it")
        bindir = os.path.dirname(sorted(glob.glob("/usr/lib/postgresql/*/bin/pg_ctl"))[-1])
        command = f"{bindir}/pg_ctl -D {self.folder}/data -w -m fast {action} >/dev/null"
        if action == "start":
            command = f"{bindir}/pg_ctl -D {self.folder}/data -l {self.folder}/server.log -w start >/dev/null"
        if os.geteuid() == 0:
            subprocess.run(["su", "postgres", "-s", "/bin/sh", "-c", command], check=True)
        else:
            subprocess.run(["sh", "-c", command], check=True)

    def stop(self) -> None:
        self._ctl("stop")

    def start(self) -> None:
        self._ctl("start")


def _have_initdb() -> bool:
    return bool(glob.glob("/usr/lib/postgresql/*/bin/initdb"))


@pytest.fixture(scope="session")
def pg_server():
    given = os.environ.get("STATION_TEST_PG_URL")
    if given:
        yield PgServer(given, None)
        return
    if not _have_initdb():
        pytest.skip("no PostgreSQL server: initdb not found (apt-get install postgresql, or set "
                    "STATION_TEST_PG_URL)")
    done = subprocess.run(["bash", str(SCRIPT), "start"], capture_output=True, text=True)
    if done.returncode != 0:
        pytest.skip(f"PostgreSQL did not start: {done.stderr.strip()[:300]}")
    url, folder = done.stdout.split()
    server = PgServer(url, folder)
    try:
        yield server
    finally:
        subprocess.run(["bash", str(SCRIPT), "stop", folder], capture_output=True)


@pytest.fixture
def store_url(pg_server: PgServer) -> str:
    """A fresh, empty database on the test server."""
    import psycopg

    name = f"t_{uuid.uuid4().hex[:12]}"
    with psycopg.connect(pg_server.url, autocommit=True) as conn:
        conn.execute(f"CREATE DATABASE {name}")
    return pg_server.database(name)


@pytest.fixture
def store(store_url: str) -> str:
    """A fresh database with the store's tables."""
    from station.store.connect import connect
    from station.store.schema import migrate

    with connect(store_url, autocommit=True) as conn:
        migrate(conn, "test")
    return store_url

"""The live sink of `station run/dry-run --store URL`: a background worker that publishes the
lot's folder into the store as parts are logged, and never holds up the bench.

The lot loop only sets an event after a part is durable in the folder (`part_logged`); the
worker wakes, publishes whatever the folder holds that the store lacks (station/store/
publish.py: committed indexes only, never a part twice), and waits again. If the store is
down it says so once, keeps the parts as backlog and retries with a growing pause; the folder
is the record either way, and `station publish` can always send the rest later. At the lot's
end `close()` makes a last attempt, bounded in time, and reports what is still to publish.
"""

from __future__ import annotations

import threading
from collections.abc import Callable
from pathlib import Path
from typing import TYPE_CHECKING

from station.store.connect import StoreError, connect, scrub, shown

if TYPE_CHECKING:
    import psycopg

RETRY_START_S = 1.0
RETRY_MAX_S = 30.0
POLL_S = 5.0


class LiveSink:
    def __init__(self, url: str, folder: Path, tell: Callable[[str], None]) -> None:
        self.url, self.folder, self.tell = url, Path(folder), tell
        self._wake = threading.Event()
        self._stop = threading.Event()
        self._idle = threading.Event()
        self._thread = threading.Thread(target=self._work, name="store-sink", daemon=True)
        self._conn: psycopg.Connection | None = None
        self._pause = 0.0
        self._down = False
        self.published = 0          # parts in the store for this lot, as last seen
        self.last_error = ""

    # --- the lot loop's side: never blocks ----------------------------------------------------
    def start(self) -> LiveSink:
        self._thread.start()
        return self

    def part_logged(self, *_: object) -> None:
        self._wake.set()

    # --- the end of the lot -----------------------------------------------------------------
    def close(self, timeout_s: float = 15.0) -> str:
        """One last publish (at most `timeout_s`), then stop; a line saying where the lot stands."""
        self._pause = 0.0
        self._idle.clear()
        self._stop.set()
        self._wake.set()
        self._thread.join(timeout_s)
        where = shown(self.url)
        if self._thread.is_alive() or self.last_error:
            reason = self.last_error or "still publishing when the lot ended"
            return (f"store {where}: not every part is published ({reason}); the datalog has them all: "
                    f"station publish {self.folder} --store URL")
        return f"store {where}: {self.published} part(s) of this lot published"

    # --- the worker ---------------------------------------------------------------------------
    def _work(self) -> None:
        while True:
            self._wake.wait(POLL_S)
            self._wake.clear()
            stopping = self._stop.is_set()
            if self._pause and not stopping:
                if self._stop.wait(self._pause):
                    stopping = True
            self._publish_once()
            if stopping:
                break
        if self._conn is not None:
            try:
                self._conn.close()
            except Exception:
                pass

    def _publish_once(self) -> None:
        import psycopg

        from station.datalog.folder import DatalogError
        from station.store.publish import publish_folder, read_folder
        from station.store.schema import require_current

        try:
            conn = self._conn
            if conn is None or conn.closed:
                conn = self._conn = connect(self.url, autocommit=True, timeout_s=3)
                require_current(conn, shown(self.url))
            result = publish_folder(conn, read_folder(self.folder))
            self.published = result.parts_before + result.parts_added
            if self._down:
                self.tell(f"store {shown(self.url)}: reachable again; backlog published "
                          f"({self.published} part(s) in the store)")
            self._down, self._pause, self.last_error = False, 0.0, ""
        except DatalogError:
            self.last_error = "the folder was being written; retried"      # a line mid-write: next time
        except (StoreError, psycopg.Error, OSError) as exc:
            text = scrub(str(exc).strip().splitlines()[0] if str(exc).strip() else type(exc).__name__, self.url)
            self.last_error = text
            if not self._down:
                self.tell(f"store {shown(self.url)}: cannot publish ({text}); the lot goes on, the parts "
                          "wait in the datalog and are published when the store answers")
            self._down = True
            self._pause = min(max(self._pause * 2, RETRY_START_S), RETRY_MAX_S)
            if self._conn is not None:
                try:
                    self._conn.close()
                except Exception:
                    pass
                self._conn = None
        except Exception as exc:     # a bug here must never reach the bench
            self.last_error = f"{type(exc).__name__}: {scrub(str(exc), self.url)}"
            self._pause = RETRY_MAX_S

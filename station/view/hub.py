"""One thread that recomputes the snapshot when the folder changes and offers it to every
open page, so the lot's own threads never compute anything for the page.

Each page gets a queue of one: a new snapshot replaces one the page has not taken yet, so a
page that reads slowly, or never, holds one snapshot at most, and the hub never waits for it.
"""

from __future__ import annotations

import asyncio
import threading
import time
from collections.abc import Callable
from typing import Any

from station.view.snapshot import LotSnapshots, snapshot_json

POLL_S = 0.5              # look at the folder's files this often
REFRESH_S = 5.0           # recompute at least this often (elapsed time, remaining, quiet lot)
MIN_GAP_S = 0.25          # and at most this often: the sites of an index are logged in a burst
DUTY = 0.1                # and never more than this share of the time (a long lot's snapshot takes longer)
MAX_PAGES = 32            # open pages at once; more are refused (503)


class SnapshotHub:
    def __init__(self, snapshots: LotSnapshots, poll_s: float = POLL_S, refresh_s: float = REFRESH_S,
                 on_error: Callable[[str], None] | None = None, min_gap_s: float = MIN_GAP_S) -> None:
        self.snapshots = snapshots
        self.poll_s = poll_s
        self.refresh_s = refresh_s
        self.min_gap_s = min_gap_s
        self.on_error = on_error or (lambda text: None)
        self.latest = snapshot_json({"state": {"key": "waiting", "label": "WAITING", "detail": "starting"}})
        self.computed = 0          # snapshots computed, for tests and the benchmark
        self._last_error = ""
        self._pages: dict[asyncio.Queue[str], asyncio.AbstractEventLoop] = {}
        self._lock = threading.Lock()
        self._wake = threading.Event()
        self._stop = threading.Event()
        self._thread = threading.Thread(target=self._loop, name="live-page", daemon=True)

    def start(self) -> None:
        self._refresh()
        self._thread.start()

    def stop(self) -> None:
        self._stop.set()
        self._wake.set()
        if self._thread.is_alive():
            self._thread.join(timeout=5)

    def poke(self, *_: Any) -> None:
        """Something changed (a part was logged): look now instead of at the next poll. Cheap
        enough for the lot's thread: it only sets an event."""
        self._wake.set()

    # --- pages -------------------------------------------------------------------------
    def subscribe(self) -> asyncio.Queue[str] | None:
        """A queue for one page (on the running event loop), primed with the latest
        snapshot; None when MAX_PAGES are open already."""
        queue: asyncio.Queue[str] = asyncio.Queue(maxsize=1)
        queue.put_nowait(self.latest)
        with self._lock:
            if len(self._pages) >= MAX_PAGES:
                return None
            self._pages[queue] = asyncio.get_running_loop()
        return queue

    def unsubscribe(self, queue: asyncio.Queue[str]) -> None:
        with self._lock:
            self._pages.pop(queue, None)

    @property
    def pages(self) -> int:
        with self._lock:
            return len(self._pages)

    # --- the thread --------------------------------------------------------------------
    def _loop(self) -> None:
        signature = self.snapshots.signature()
        last = time.monotonic()
        while not self._stop.is_set():
            self._wake.wait(self.poll_s)
            self._wake.clear()
            if self._stop.is_set():
                break
            now_signature = self.snapshots.signature()
            if now_signature != signature or time.monotonic() - last >= self.refresh_s:
                signature, last = now_signature, time.monotonic()
                self._refresh()
                took = time.monotonic() - last
                self._stop.wait(max(self.min_gap_s, took / DUTY - took))

    def _refresh(self) -> None:
        try:
            text = snapshot_json(self.snapshots.compute())
        except Exception as exc:   # the page must never take the station down; say why instead
            text = f"live page: snapshot failed: {type(exc).__name__}: {exc}"
            if text != self._last_error:          # once, not at every poll
                self.on_error(text)
            self._last_error = text
            return
        self._last_error = ""
        self.computed += 1
        self.publish(text)

    def publish(self, text: str) -> None:
        """Make `text` the latest snapshot and offer it to every open page (never waits)."""
        self.latest = text
        with self._lock:
            pages = list(self._pages.items())
        for queue, loop in pages:
            try:
                loop.call_soon_threadsafe(_offer, queue, text)
            except RuntimeError:   # that page's loop has closed
                self.unsubscribe(queue)


def _offer(queue: asyncio.Queue[str], text: str) -> None:
    """Put `text` in a queue of one, replacing a snapshot the page has not taken yet."""
    if queue.full():
        queue.get_nowait()
    queue.put_nowait(text)

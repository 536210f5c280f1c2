"""Stopping a lot from outside: Ctrl-C and SIGTERM, and keeping them out of the safe state.

`LotInterrupted` derives from BaseException, like KeyboardInterrupt, so that no
`except Exception` on the way (a driver translating socket errors, a retry loop) can take
an operator's stop for an instrument failure and carry on.
"""

from __future__ import annotations

import signal
import threading
from collections.abc import Callable, Iterator
from contextlib import contextmanager


class LotInterrupted(BaseException):
    """The operator (Ctrl-C) or the system (SIGTERM) stopped the lot."""


class StopRequests:
    """Ctrl-C and SIGTERM for the life of one lot. The first one stops the lot (LotInterrupted
    in the main thread); once the lot is on its way out (stopped, or ended by itself), every
    later signal only says "wait", so a second signal can never cut short the safe state, the
    datalog's end or the summary the operator needs to read."""

    def __init__(self, tell: Callable[[str], None]) -> None:
        self.tell = tell
        self.arrived: list[int] = []
        self._testing = True

    def __call__(self, signum: int, frame: object) -> None:
        self.arrived.append(signum)
        if self._testing:
            self._testing = False
            raise LotInterrupted("stopped by Ctrl-C" if signum == signal.SIGINT
                                 else f"stopped by signal {signal.Signals(signum).name}")
        self.tell("the lot is on its way out (safe state, datalog, summary): please wait")

    def way_out(self) -> None:
        """From here on a signal stops nothing: the lot is ending already."""
        self._testing = False


@contextmanager
def stop_requests(tell: Callable[[str], None]) -> Iterator[StopRequests]:
    """Install StopRequests for SIGINT and SIGTERM. After a signal, both are ignored from the
    end of the lot on: the process is on its way out with exit 3, and a late signal must not
    kill it while it prints or exits (Python puts its own handlers back to the default at
    exit, so only an ignored signal stays harmless to the very end)."""
    requests = StopRequests(tell)
    if threading.current_thread() is not threading.main_thread():
        yield requests
        return
    previous = {sig: signal.signal(sig, requests) for sig in (signal.SIGINT, signal.SIGTERM)}
    try:
        yield requests
    finally:
        for sig, handler in previous.items():
            signal.signal(sig, signal.SIG_IGN if requests.arrived else handler)


@contextmanager
def signals_deferred(tell: Callable[[str], None] | None = None) -> Iterator[list[int]]:
    """While the bench goes to its safe state, Ctrl-C and SIGTERM only say "wait": a second
    Ctrl-C must not leave a rail up half-way. Yields the signals that arrived."""
    arrived: list[int] = []
    if threading.current_thread() is not threading.main_thread():
        yield arrived                   # handlers can only be set in the main thread
        return

    def note(signum: int, frame: object) -> None:
        arrived.append(signum)
        if tell is not None:
            tell("safe state in progress: sources ramping down and outputs turning off, please wait")

    previous = {sig: signal.signal(sig, note) for sig in (signal.SIGINT, signal.SIGTERM)}
    try:
        yield arrived
    finally:
        for sig, handler in previous.items():
            signal.signal(sig, handler)


@contextmanager
def signals_held() -> Iterator[None]:
    """Hold Ctrl-C and SIGTERM for a moment that must not be cut in two (a part's results and
    its part row): a signal that arrives is delivered, to the handler in place before, at the end."""
    if threading.current_thread() is not threading.main_thread():
        yield
        return
    arrived: list[int] = []
    previous = {sig: signal.signal(sig, lambda signum, frame: arrived.append(signum))
                for sig in (signal.SIGINT, signal.SIGTERM)}
    try:
        yield
    finally:
        for sig, handler in previous.items():
            signal.signal(sig, handler)
        if arrived:
            signal.raise_signal(arrived[0])

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


def raise_interrupted(signum: int, frame: object) -> None:
    """SIGTERM handler: stop the lot the way Ctrl-C does."""
    raise LotInterrupted(f"stopped by signal {signal.Signals(signum).name}")


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

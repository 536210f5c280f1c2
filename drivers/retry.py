"""The one retry policy of the drivers: which failures are worth another try, how many, how.

Only transactions whose resend is harmless go through it: a query that reads state (a
measurement, a status), or a setting sent as a whole with its ``*OPC?`` (programming the
same absolute level twice changes nothing). A query that moves something (the handler's
``HANDler:NEXT?``) is never resent blindly; its driver recovers by asking the state instead.

A timeout, a garbled reply or a dropped connection is tried again, reconnecting first when
the connection is gone (or after a second timeout in a row: a socket that stops answering
is often half-dead). Anything else (a refused value, a bug) is raised at once.
"""

from __future__ import annotations

import time
from collections.abc import Callable
from dataclasses import dataclass
from typing import Protocol, TypeVar

from drivers.errors import (
    InstrumentBadReply,
    InstrumentConnectionLost,
    InstrumentError,
    InstrumentOpenError,
    InstrumentTimeout,
)

T = TypeVar("T")

RETRYABLE: tuple[type[InstrumentError], ...] = (InstrumentTimeout, InstrumentConnectionLost,
                                                InstrumentBadReply)


class Reconnectable(Protocol):
    def reconnect(self) -> None: ...


@dataclass(frozen=True)
class RetryPolicy:
    attempts: int = 3           # tries in all, the first included
    pause_s: float = 0.05       # wall time between tries (lets a restarting socket come up)

    def run(self, link: Reconnectable, action: Callable[[], T],
            on_retry: Callable[[InstrumentError, int], None] | None = None) -> T:
        """Run `action`; on a retryable failure reconnect if needed and run it again."""
        timeouts = 0
        for attempt in range(1, max(1, self.attempts) + 1):
            try:
                return action()
            except RETRYABLE as exc:
                if attempt >= self.attempts:
                    raise
                timeouts = timeouts + 1 if isinstance(exc, InstrumentTimeout) else 0
                if on_retry is not None:
                    on_retry(exc, attempt)
                time.sleep(self.pause_s * attempt)
                if isinstance(exc, InstrumentConnectionLost) or timeouts >= 2:
                    try:
                        link.reconnect()
                    except InstrumentOpenError:
                        continue  # still unreachable: the next try says so (or the last raises)
        raise AssertionError("unreachable")  # the loop returns or raises


NO_RETRY = RetryPolicy(attempts=1)
DEFAULT_RETRY = RetryPolicy()

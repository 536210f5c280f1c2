"""One SCPI conversation with one instrument over pyvisa: the only module that imports pyvisa.

The link turns pyvisa's and the socket's failures into the exceptions of `drivers.errors`,
each naming the role, the resource and the command, so a driver never sees a VisaIOError.
Queries and settings go through the retry policy of `drivers.retry` (a query with
`retry=False` is sent once: its resend would not be harmless).
"""

from __future__ import annotations

import math
import select
import socket
import threading
import time
from collections.abc import Callable, Iterator, Sequence
from contextlib import ExitStack, contextmanager
from typing import Any, TypeVar

import pyvisa
from pyvisa import constants

from drivers.errors import (
    InstrumentBadReply,
    InstrumentConnectionLost,
    InstrumentError,
    InstrumentNotSent,
    InstrumentOpenError,
    InstrumentReportedError,
    InstrumentTimeout,
)
from drivers.retry import DEFAULT_RETRY, RETRYABLE, RetryPolicy
from drivers.scpi_values import parse_error_entry, parse_scpi_bool, parse_scpi_float

# More than the SCPI queue depth (16) plus its overflow entry: a queue that never empties is broken.
_MAX_ERROR_READS = 20

T = TypeVar("T")

_CONNECTION_CODES = {
    constants.StatusCode.error_connection_lost,
    constants.StatusCode.error_io,
    constants.StatusCode.error_invalid_object,
    constants.StatusCode.error_closing_failed,
}


class ScpiLink:
    """A VISA resource opened for SCPI text messages, with errors mapped to our exceptions."""

    def __init__(self, role: str, resource: str, visa_library: str = "@py",
                 timeout_s: float = 5.0, retry: RetryPolicy = DEFAULT_RETRY) -> None:
        self.role = role
        self.resource = resource
        self.visa_library = visa_library
        self._timeout_s = float(timeout_s)
        self._applied_timeout_ms: float | None = None  # what the open resource has now
        self.transactions = 0          # messages sent (writes and queries)
        self.retry = retry
        self.retries = 0               # transactions sent again after a failure
        self.reconnects = 0
        self._manager: Any = None
        self._instrument: Any = None
        self._last_command: str | None = None
        self._stale = False            # a reply may still be in flight after a failed query
        self._lock = threading.Lock()

    # -- life cycle ------------------------------------------------------------------

    @property
    def is_open(self) -> bool:
        return self._instrument is not None

    @property
    def timeout_s(self) -> float:
        return self._timeout_s

    @timeout_s.setter
    def timeout_s(self, value: float) -> None:
        self._timeout_s = float(value)
        if self._instrument is not None:
            self._instrument.timeout = self._timeout_s * 1000.0
            self._applied_timeout_ms = self._timeout_s * 1000.0

    def open(self) -> None:
        """Open the resource; InstrumentOpenError if the library or the resource cannot be opened."""
        if self._instrument is not None:
            return
        try:
            # An empty library string means the system's default VISA library.
            self._manager = (pyvisa.ResourceManager(self.visa_library) if self.visa_library
                             else pyvisa.ResourceManager())
        except Exception as exc:  # pyvisa raises several kinds for a missing library
            raise InstrumentOpenError(self.role, self.resource, None,
                                      f"cannot load VISA library {self.visa_library!r}: {exc}") from exc
        try:
            instrument = self._manager.open_resource(
                self.resource, open_timeout=int(self._timeout_s * 1000))
        except Exception as exc:
            self._close_manager()
            raise InstrumentOpenError(self.role, self.resource, None,
                                      f"cannot be opened: {exc}") from exc
        instrument.timeout = self._timeout_s * 1000.0
        self._applied_timeout_ms = self._timeout_s * 1000.0
        instrument.write_termination, instrument.read_termination = terminations(self.resource)
        _disable_send_delay(instrument)
        self._instrument = instrument
        self._stale = False

    def close(self) -> None:
        """Close the resource; never raises (it is called on the way out of errors)."""
        instrument, self._instrument = self._instrument, None
        if instrument is not None:
            try:
                instrument.close()
            except Exception:  # closing a dead connection may fail; nothing left to do
                pass
        self._close_manager()

    def reconnect(self) -> None:
        """Close and open again, e.g. after a dropped connection or a timeout."""
        self.close()
        self.reconnects += 1
        self.open()

    def _close_manager(self) -> None:
        # pyvisa shares one ResourceManager per VISA library: closing it would close every
        # other instrument's session too, so a link only lets go of its reference.
        self._manager = None

    def __enter__(self) -> ScpiLink:
        self.open()
        return self

    def __exit__(self, *exc_info: object) -> None:
        self.close()

    # -- transactions ----------------------------------------------------------------

    def write(self, command: str, retry: bool = True) -> None:
        """Send a message without a reply (settings are absolute, so a resend is harmless)."""
        self._with_retry(lambda: self._write_once(command), retry)

    def _write_once(self, command: str) -> None:
        with self._lock:
            instrument = self._prepare(command)
            try:
                instrument.write(command)
            except BaseException as exc:
                self._stale = True
                if not isinstance(exc, Exception):
                    raise               # Ctrl-C, SIGTERM: not an instrument failure
                raise self._translate(exc, command, self._timeout_s) from exc
            finally:
                self.transactions += 1
            self._last_command = command

    def write_and_wait(self, command: str) -> None:
        """Send a setting and wait until the instrument has applied it (``*OPC?``).

        A plain write returns as soon as the bytes are sent; the next transaction on another
        instrument could then run before this one takes effect (a relay not yet closed, a rail
        not yet moved). Every setting the sequence depends on goes through here. A failure
        sends the setting again as a whole, with its ``*OPC?``.
        """
        full = f"{command};*OPC?"

        def check(reply: str) -> None:
            if reply.strip() != "1":
                raise InstrumentBadReply(self.role, self.resource, full,
                                         f"returned {_shorten(reply)!r} where '1' was expected")

        self._ask(full, None, check, True)

    def write_and_check(self, command: str) -> None:
        """`write_and_wait` and `check_errors` in one round trip: the setting, ``*OPC?`` and the
        first error-queue entry in one message (IEEE 488.2 joins the two replies with ";").
        The rest of the queue is read only when that entry is an error.

        A failure sends the message again as a whole: an entry its lost reply took off the
        queue comes back with the resend, because the same setting raises the same error.
        A command error (-1xx) ends the message there (IEEE 488.2), so its queries never
        answer: a timeout, as with `write_and_wait`.
        """
        full = f"{command};*OPC?;:SYST:ERR?"

        def parse(reply: str) -> tuple[int, str]:
            done, _, entry = reply.partition(";")
            if done.strip() != "1":
                raise InstrumentBadReply(self.role, self.resource, full,
                                         f"returned {_shorten(reply)!r} where '1;<error entry>' was expected")
            try:
                return parse_error_entry(entry)
            except ValueError:
                raise InstrumentBadReply(self.role, self.resource, full,
                                         f"returned {_shorten(reply)!r}, not '1;code,\"message\"'") from None

        first = self._ask(full, None, parse, True)
        self._last_command = command
        if first[0] == 0:
            return
        try:
            self.check_errors()
        except InstrumentReportedError as rest:
            raise InstrumentReportedError(self.role, self.resource, command, [first, *rest.errors]) from None
        raise InstrumentReportedError(self.role, self.resource, command, [first])

    def query(self, command: str, timeout_s: float | None = None, retry: bool = True) -> str:
        """Send a query and return its reply without the terminator."""
        return self._ask(command, timeout_s, lambda reply: reply, retry)

    def query_float(self, command: str, timeout_s: float | None = None, retry: bool = True,
                    unit: str | None = None) -> float:
        """A numeric reply; SCPI overload (9.9E37) becomes +-inf. `unit`: the unit the reply
        may carry after the number (a reply in another unit is a bad reply)."""
        def one(reply: str) -> float:
            values = self._floats(command, reply, unit)
            if len(values) != 1:
                raise InstrumentBadReply(self.role, self.resource, command,
                                         f"returned {len(values)} values where one was expected")
            return values[0]

        return self._ask(command, timeout_s, one, retry)

    def query_floats(self, command: str, timeout_s: float | None = None, retry: bool = True,
                     unit: str | None = None) -> list[float]:
        """A comma-separated numeric reply."""
        return self._ask(command, timeout_s, lambda reply: self._floats(command, reply, unit), retry)

    def query_bools(self, command: str, timeout_s: float | None = None, retry: bool = True) -> list[bool]:
        """A comma-separated boolean reply (1/0, ON/OFF)."""
        return self._ask(command, timeout_s, lambda reply: self._bools(command, reply), retry)

    def query_bool(self, command: str, timeout_s: float | None = None, retry: bool = True) -> bool:
        def one(reply: str) -> bool:
            values = self._bools(command, reply)
            if len(values) != 1:
                raise InstrumentBadReply(self.role, self.resource, command,
                                         f"returned {len(values)} values where one was expected")
            return values[0]

        return self._ask(command, timeout_s, one, retry)

    def parse_floats(self, command: str, reply: str, unit: str | None = None) -> list[float]:
        """The numbers of a comma-separated reply to `command`; InstrumentBadReply if it is not."""
        return self._floats(command, reply, unit)

    def with_retry(self, action: Callable[[], T]) -> T:
        """Run `action` (transactions of this link) under the link's retry policy."""
        return self._with_retry(action, True)

    def _floats(self, command: str, reply: str, unit: str | None = None) -> list[float]:
        try:
            return [parse_scpi_float(part, unit) for part in reply.split(",")]
        except ValueError as exc:
            raise InstrumentBadReply(self.role, self.resource, command,
                                     f"returned {_shorten(reply)!r}, not a number"
                                     + (f" ({exc})" if "unit" in str(exc) else "")) from None

    def _bools(self, command: str, reply: str) -> list[bool]:
        try:
            return [parse_scpi_bool(part) for part in reply.split(",")]
        except ValueError:
            raise InstrumentBadReply(self.role, self.resource, command,
                                     f"returned {_shorten(reply)!r}, not 1/0 values") from None

    def _ask(self, command: str, timeout_s: float | None, parse: Callable[[str], T], retry: bool) -> T:
        """One query and the parsing of its reply, retried together: a garbled reply is resent."""
        return self._with_retry(lambda: parse(self._query_once(command, timeout_s)), retry)

    def _with_retry(self, action: Callable[[], T], retry: bool) -> T:
        if not retry:
            return action()

        def count(exc: InstrumentError, attempt: int) -> None:
            self.retries += 1

        return self.retry.run(self, action, on_retry=count)

    def _query_once(self, command: str, timeout_s: float | None) -> str:
        wait = self._timeout_s if timeout_s is None else float(timeout_s)
        with self._lock:
            reply = self._receive(self._send(command, wait), command, wait)
        if isinstance(reply, InstrumentError):
            raise reply
        return reply

    def _send(self, command: str, wait_s: float) -> Any:
        """The write half of a query (the caller holds the lock); the instrument it went out on."""
        instrument = self._prepare(command)
        try:
            with self._timeout(instrument, wait_s):
                instrument.write(command)
        except BaseException as exc:
            # A reply may still arrive: the next transaction must not take it for its own.
            self._stale = True
            self.transactions += 1
            if not isinstance(exc, Exception):
                raise               # Ctrl-C, SIGTERM: not an instrument failure
            raise self._translate(exc, command, wait_s) from exc
        return instrument

    def _receive(self, instrument: Any, command: str, wait_s: float) -> str | InstrumentError:
        """The read half of a query sent with `_send` (the caller holds the lock)."""
        try:
            with self._timeout(instrument, wait_s):
                reply = instrument.read()
        except BaseException as exc:
            self._stale = True
            if not isinstance(exc, Exception):
                raise
            error = self._translate(exc, command, wait_s)
            if error is not exc:
                error.__cause__ = exc   # as `raise ... from exc` would chain it
            return error
        finally:
            self.transactions += 1
        self._last_command = command
        return reply.strip()

    def check_errors(self) -> None:
        """Read SYST:ERR? until it is empty; InstrumentReportedError lists what was queued."""
        self._drain_errors(self._last_command, self._read_error_entry())

    def _drain_errors(self, blamed: str | None, reply: str) -> None:
        """The rest of `check_errors`, from the reply of its first SYST:ERR? read."""
        found: list[tuple[int, str]] = []
        for read in range(_MAX_ERROR_READS):
            if read:
                # Each read takes an entry off the queue, so a read is never resent: a lost
                # reply may have carried an error, and the caller must treat the queue as not clean.
                reply = self._read_error_entry()
            try:
                code, message = parse_error_entry(reply)
            except ValueError:
                raise InstrumentBadReply(self.role, self.resource, "SYST:ERR?",
                                         f"returned {_shorten(reply)!r}, not 'code,\"message\"'") from None
            if code == 0:
                break
            found.append((code, message))
        else:
            raise InstrumentBadReply(self.role, self.resource, "SYST:ERR?",
                                     f"error queue did not empty after {_MAX_ERROR_READS} reads")
        self._last_command = blamed
        if found:
            raise InstrumentReportedError(self.role, self.resource, blamed, found)

    def _drain_errors_after(self, blamed: str | None, reply: str | InstrumentError) -> None:
        """`check_errors` whose first read went out with `query_together`."""
        if isinstance(reply, InstrumentNotSent):     # nothing was taken off the queue
            self._last_command = blamed
            self.check_errors()
            return
        if isinstance(reply, RETRYABLE):
            raise InstrumentBadReply(self.role, self.resource, "SYST:ERR?",
                                     f"could not be read ({reply.detail}); an error entry may be lost") from reply
        if isinstance(reply, InstrumentError):
            raise reply
        self._drain_errors(blamed, reply)

    def _read_error_entry(self) -> str:
        # A read that never went out (the link was found closed) lost nothing: reconnect and
        # read again. A read that went out and failed may have taken an entry with it.
        for attempt in range(max(1, self.retry.attempts)):
            try:
                return self.query("SYST:ERR?", retry=False)
            except InstrumentNotSent as exc:
                if attempt + 1 >= self.retry.attempts:
                    raise
                self.retries += 1
                try:
                    self.reconnect()
                except InstrumentOpenError:
                    raise exc from None
            except RETRYABLE as exc:
                raise InstrumentBadReply(self.role, self.resource, "SYST:ERR?",
                                         f"could not be read ({exc.detail}); an error entry may be lost") from exc
        raise AssertionError("unreachable")

    def identify(self) -> str:
        return self.query("*IDN?")

    def reset(self) -> None:
        """*RST and *CLS, then wait until the instrument has done them."""
        self.write("*RST")
        self.write("*CLS")
        self.query("*OPC?")

    # -- internals -------------------------------------------------------------------

    def _prepare(self, command: str) -> Any:
        instrument = self._instrument
        if instrument is None:
            raise InstrumentNotSent(self.role, self.resource, command,
                                    "not sent: the link is not open (call open() or reconnect())")
        state = _socket_state(instrument)
        if state == "closed":
            raise InstrumentNotSent(self.role, self.resource, command,
                                    "not sent: the instrument closed the connection")
        if self._stale or state == "data":
            instrument = self._resynchronise(command)
        return instrument

    def _resynchronise(self, command: str) -> Any:
        """Make sure no late reply to an earlier, failed query can answer the next one.

        A raw socket has no device clear that reaches the instrument and no message ids, so
        bytes of a late reply may still arrive after any local flush: the link opens a fresh
        connection, which can never receive the old one's data. INSTR sessions (HiSLIP,
        VXI-11, USBTMC, GPIB) have a real device clear, which discards the instrument's
        output queue and pending input."""
        self._stale = False
        if _is_raw_socket(self.resource):
            self.close()
            self.reconnects += 1
            try:
                self.open()
            except InstrumentOpenError as exc:
                self._stale = True
                raise InstrumentNotSent(self.role, self.resource, command,
                                        f"not sent: could not reconnect to resynchronise ({exc.detail})") from exc
            return self._instrument
        instrument = self._instrument
        try:
            instrument.clear()
            return instrument
        except Exception as exc:
            # pyvisa-py's HiSLIP client does not drain a reply that arrived before the clear
            # and fails on it: a fresh session is the sure way back in step.
            failure = exc
        self.close()
        self.reconnects += 1
        try:
            self.open()
        except InstrumentOpenError as exc:
            self._stale = True
            raise InstrumentNotSent(self.role, self.resource, command,
                                    f"not sent: device clear failed ({failure}) and so did "
                                    f"reconnecting ({exc.detail})") from exc
        return self._instrument

    @contextmanager
    def _timeout(self, instrument: Any, seconds: float) -> Iterator[None]:
        # Setting a pyvisa timeout costs client time on every call (a DMM's READ? carries its
        # integration time in its timeout): apply it only when it changes. A write that runs
        # under a longer timeout than the default only waits longer on a blocked send.
        wanted_ms = seconds * 1000.0
        if self._applied_timeout_ms is None or not math.isclose(wanted_ms, self._applied_timeout_ms):
            instrument.timeout = wanted_ms
            self._applied_timeout_ms = wanted_ms
        yield

    def _translate(self, exc: Exception, command: str, wait_s: float) -> InstrumentError:
        if isinstance(exc, InstrumentError):
            return exc
        if isinstance(exc, pyvisa.errors.VisaIOError):
            if exc.error_code == constants.StatusCode.error_timeout:
                # pyvisa-py reports a socket closed by the peer as a timeout: tell them apart.
                if self._instrument is not None and _socket_state(self._instrument) == "closed":
                    return InstrumentConnectionLost(self.role, self.resource, command,
                                                    "failed: the instrument closed the connection")
                return InstrumentTimeout(self.role, self.resource, command,
                                         f"timed out after {wait_s:.1f} s")
            if exc.error_code in _CONNECTION_CODES:
                return InstrumentConnectionLost(self.role, self.resource, command,
                                                f"failed: connection lost ({exc.abbreviation})")
            return InstrumentError(self.role, self.resource, command, f"failed: {exc}")
        if isinstance(exc, pyvisa.errors.InvalidSession):
            return InstrumentConnectionLost(self.role, self.resource, command,
                                            "failed: the VISA session is closed (reconnect)")
        if isinstance(exc, OSError):
            return InstrumentConnectionLost(self.role, self.resource, command,
                                            f"failed: connection lost ({exc.__class__.__name__}: {exc})")
        if isinstance(exc, RuntimeError) and _is_dropped_link(exc, self._instrument):
            # pyvisa-py's HiSLIP reader raises a bare RuntimeError when the peer closes.
            return InstrumentConnectionLost(self.role, self.resource, command,
                                            "failed: the instrument closed the connection")
        if isinstance(exc, UnicodeDecodeError):
            return InstrumentBadReply(self.role, self.resource, command,
                                      "returned bytes that are not text (garbled reply)")
        return InstrumentError(self.role, self.resource, command, f"failed: {exc!r}")


def query_together(requests: Sequence[tuple[ScpiLink, str, float]],
                   clock: Callable[[], float] = time.monotonic) -> list[tuple[float, str | InstrumentError]]:
    """Send each query (link, command, timeout) on its own link, then read the replies in the
    same order: the instruments work at once (each DMM integrates while the next is
    triggered) with no thread per instrument. Each result is (clock time the query was sent,
    reply) or, where the send or the read failed, (time, the InstrumentError): that link is
    marked out of step as after any failed query, and the caller resends the query alone
    (`ScpiLink.query` and its retry policy). The links must be distinct."""
    links = [link for link, _, _ in requests]
    if len(set(map(id, links))) != len(links):
        raise ValueError("query_together needs one query per link")
    results: list[tuple[float, str | InstrumentError]] = []
    sent: list[Any] = []          # the instrument each query went out on, or None
    with ExitStack() as locks:
        for link in links:        # always in the callers' order; others take one lock at a time
            locks.enter_context(link._lock)
        try:
            for link, command, wait in requests:
                at = clock()
                try:
                    sent.append(link._send(command, wait))
                    results.append((at, ""))
                except InstrumentError as exc:
                    sent.append(None)
                    results.append((at, exc))
            for index, (link, command, wait) in enumerate(requests):
                instrument, sent[index] = sent[index], None
                if instrument is not None:
                    results[index] = (results[index][0], link._receive(instrument, command, wait))
        except BaseException:
            # Ctrl-C between a send and its read: those replies will still come.
            for link, instrument in zip(links, sent, strict=False):
                if instrument is not None:
                    link._stale = True
            raise
    return results


def check_errors_together(links: Sequence[ScpiLink]) -> None:
    """`check_errors` of several links, their first SYST:ERR? reads sent at once (one round
    trip for all while the queues are empty, as they are after a clean index). Every link
    is read to the end; the first InstrumentError found is raised after that."""
    blamed = [link._last_command for link in links]
    replies = query_together([(link, "SYST:ERR?", link.timeout_s) for link in links])
    problem: InstrumentError | None = None
    for link, culprit, (_, reply) in zip(links, blamed, replies, strict=True):
        try:
            link._drain_errors_after(culprit, reply)
        except InstrumentError as exc:
            problem = problem or exc
    if problem is not None:
        raise problem


def terminations(resource: str) -> tuple[str, str | None]:
    """(write, read) termination of a resource's messages, by transport.

    Every message the station sends ends with a newline (IEEE 488.2's terminator, which every
    transport's instruments accept). How a reply ends depends on the transport: a raw socket
    (``::SOCKET``) and a serial line (``ASRL``) carry bytes only, so the newline is the only
    end a reply has; INSTR sessions (HiSLIP, VXI-11, USBTMC, GPIB) mark the last byte of a
    message with END (HiSLIP's DataEnd, VXI-11's END flag, USBTMC's EOM bit, GPIB's EOI
    line), so the read ends there and a binary block may hold any byte. The newline an
    INSTR reply still ends with is stripped with the other white space."""
    upper = resource.strip().upper()
    if upper.endswith("::SOCKET") or upper.startswith("ASRL"):
        return "\n", "\n"
    return "\n", None


def _pyvisa_py_socket(instrument: Any) -> socket.socket | None:
    """The TCP socket of a pyvisa-py SOCKET session, or of a HiSLIP session's synchronous
    channel (where replies arrive); None for any other session or backend."""
    try:
        interface = instrument.visalib.sessions[instrument.session].interface
    except Exception:
        return None
    sock = getattr(interface, "_sync", interface)   # pyvisa-py's HiSLIP client keeps it there
    return sock if isinstance(sock, socket.socket) and sock.fileno() >= 0 else None


def _disable_send_delay(instrument: Any) -> None:
    """Send each message at once (TCP_NODELAY).

    pyvisa-py leaves Nagle's algorithm on, so a second short message (FETCh? after INIT)
    waited about 40 ms for the delayed acknowledgement of the first.
    """
    sock = _pyvisa_py_socket(instrument)
    if sock is not None and sock.family in (socket.AF_INET, socket.AF_INET6):
        try:
            sock.setsockopt(socket.IPPROTO_TCP, socket.TCP_NODELAY, 1)
        except OSError:
            pass  # an option the platform refuses costs speed, not correctness


def _socket_state(instrument: Any) -> str:
    """'closed', 'data' (unread bytes waiting), 'idle', or 'unknown' for non-socket backends.

    Only pyvisa-py exposes its socket; other VISA libraries report a lost link themselves.
    """
    sock = _pyvisa_py_socket(instrument)
    if sock is None:
        return "unknown"
    try:
        readable, _, _ = select.select([sock], [], [], 0)
        if not readable:
            return "idle"
        return "closed" if sock.recv(1, socket.MSG_PEEK) == b"" else "data"
    except OSError:
        return "closed"


def _is_dropped_link(exc: RuntimeError, instrument: Any) -> bool:
    """True when a RuntimeError from the VISA library means the peer closed the link."""
    if "connection was dropped" in str(exc).lower():
        return True
    return instrument is not None and _socket_state(instrument) == "closed"


def _is_raw_socket(resource: str) -> bool:
    return resource.upper().endswith("::SOCKET")


def _shorten(text: str, limit: int = 60) -> str:
    return text if len(text) <= limit else text[:limit] + "..."

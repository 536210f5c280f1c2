"""HiSLIP server of one simulated instrument (IVI-6.1, synchronized mode only).

A HiSLIP session is two TCP connections to one port: the synchronous channel carries the
program and response messages (Data / DataEnd, END being the DataEnd), the asynchronous one
the out-of-band requests (device clear, status byte, locks, maximum message size). The first
message on a connection says which it is: Initialize opens a session on the synchronous
channel, AsyncInitialize with that session's id joins its asynchronous channel.

Implemented: Initialize / InitializeResponse, AsyncInitialize / AsyncInitializeResponse,
Data and DataEnd both ways (long replies split to the client's maximum message size),
AsyncMaxMsgSize, AsyncDeviceClear / AsyncDeviceClearAcknowledge followed by
DeviceClearComplete / DeviceClearAcknowledge, AsyncStatusQuery, AsyncLock (exclusive only;
a lock held by another session is refused at once, not waited for), AsyncLockInfo,
AsyncRemoteLocalControl; Error for any other message type, FatalError for a bad header or
a wrong initialisation. Not implemented: overlapped mode, shared locks, Trigger (ignored),
service requests, encryption and authentication (HiSLIP 2.0).

The instrument's faults apply as on the raw socket server; an injected latency ends early
when the client clears the device, and the reply is then never sent.
"""

from __future__ import annotations

import socket
import struct
import threading
from collections.abc import Callable
from dataclasses import dataclass, field

from sim_instruments.clock import ModelClock
from sim_instruments.faults import FaultSettings
from sim_instruments.instrument import Instrument
from sim_instruments.server import (
    CLOSE,
    SEND,
    SKIP,
    CommandRecord,
    InstrumentServer,
    _close,
    _peer_closed,
    serve_message,
)

HEADER = struct.Struct("!2sBBIQ")   # prologue "HS", type, control code, parameter, payload length
PROLOGUE = b"HS"
PROTOCOL_VERSION = 0x0100           # 1.0: what pyvisa-py's client asks for
VENDOR_ID = b"AS"                   # two letters for our simulated bench (invented)
SERVER_MAX_MESSAGE = 1 << 20        # the largest message this server accepts
UNSET_MESSAGE_ID = 0xFFFF_FFFF      # a reply's id when no request id is known

# Message types (IVI-6.1 table of message types).
INITIALIZE, INITIALIZE_RESPONSE, FATAL_ERROR, ERROR = 0, 1, 2, 3
ASYNC_LOCK, ASYNC_LOCK_RESPONSE, DATA, DATA_END = 4, 5, 6, 7
DEVICE_CLEAR_COMPLETE, DEVICE_CLEAR_ACKNOWLEDGE = 8, 9
ASYNC_REMOTE_LOCAL_CONTROL, ASYNC_REMOTE_LOCAL_RESPONSE, TRIGGER = 10, 11, 12
ASYNC_MAX_MSG_SIZE, ASYNC_MAX_MSG_SIZE_RESPONSE = 15, 16
ASYNC_INITIALIZE, ASYNC_INITIALIZE_RESPONSE, ASYNC_DEVICE_CLEAR = 17, 18, 19
ASYNC_STATUS_QUERY, ASYNC_STATUS_RESPONSE, ASYNC_DEVICE_CLEAR_ACKNOWLEDGE = 21, 22, 23
ASYNC_LOCK_INFO, ASYNC_LOCK_INFO_RESPONSE = 24, 25

# Error and fatal error codes.
FATAL_BAD_HEADER, FATAL_NOT_INITIALIZED, FATAL_BAD_INIT = 1, 2, 3
ERROR_UNRECOGNIZED_TYPE, ERROR_TOO_LARGE = 1, 4
LOCK_FAILURE, LOCK_SUCCESS, LOCK_ERROR = 0, 1, 3


class _Closed(Exception):
    """The peer closed the connection or the server is stopping."""


@dataclass
class _Session:
    session_id: int
    sync: socket.socket
    async_channel: socket.socket | None = None
    client_max_message: int = SERVER_MAX_MESSAGE
    clearing: threading.Event = field(default_factory=threading.Event)
    send_lock: threading.Lock = field(default_factory=threading.Lock)


class HislipServer(InstrumentServer):
    """The instrument behind one HiSLIP port, with the sub-address `sub_address`."""

    def __init__(self, instrument: Instrument, faults: FaultSettings, clock: ModelClock,
                 host: str = "127.0.0.1", port: int = 0,
                 log: Callable[[CommandRecord], None] | None = None,
                 sub_address: str = "hislip0") -> None:
        super().__init__(instrument, faults, clock, host, port, log)
        self.sub_address = sub_address
        self._sessions: dict[int, _Session] = {}
        self._next_session = 1
        self._lock_owner: int | None = None

    @property
    def resource(self) -> str:
        return f"TCPIP0::{self.host}::{self.sub_address},{self.port}::INSTR"

    # -- one connection: which channel it is -------------------------------------------------

    def _serve(self, conn: socket.socket) -> None:
        session: _Session | None = None
        try:
            kind, control, parameter, length = self._header(conn)
            payload = self._exact(conn, length)
            if kind == INITIALIZE:
                session = self._open_session(conn, parameter, payload)
                if session is not None:
                    self._sync_loop(session)
            elif kind == ASYNC_INITIALIZE:
                session = self._join_async(conn, parameter)
                if session is not None:
                    self._async_loop(session)
            else:
                _send(conn, FATAL_ERROR, FATAL_NOT_INITIALIZED, 0,
                      b"initialize the synchronous channel first")
        except (_Closed, OSError):
            pass
        finally:
            with self._guard:
                self._connections.discard(conn)
            _close(conn)
            if session is not None:
                self._end_session(session)

    def _open_session(self, conn: socket.socket, parameter: int, payload: bytes) -> _Session | None:
        asked = payload.decode("ascii", "replace")
        if asked.lower() != self.sub_address.lower():
            _send(conn, FATAL_ERROR, FATAL_BAD_INIT, 0,
                  f"no device {asked!r} here; this one is {self.sub_address!r}".encode())
            return None
        with self._guard:
            session_id = self._next_session
            self._next_session = self._next_session % 0xFFFF + 1
            session = _Session(session_id, conn)
            self._sessions[session_id] = session
        # Control code 0: synchronized mode (no overlap); parameter: version and session id.
        _send(conn, INITIALIZE_RESPONSE, 0, (PROTOCOL_VERSION << 16) | session_id)
        return session

    def _join_async(self, conn: socket.socket, parameter: int) -> _Session | None:
        with self._guard:
            session = self._sessions.get(parameter & 0xFFFF)
            if session is not None and session.async_channel is None:
                session.async_channel = conn
            else:
                session = None
        if session is None:
            _send(conn, FATAL_ERROR, FATAL_BAD_INIT, 0, b"unknown session id")
            return None
        _send(conn, ASYNC_INITIALIZE_RESPONSE, 0, int.from_bytes(VENDOR_ID.rjust(4, b"\0"), "big"))
        return session

    def _end_session(self, session: _Session) -> None:
        with self._guard:
            if self._sessions.pop(session.session_id, None) is None:
                return
            if self._lock_owner == session.session_id:
                self._lock_owner = None
        # Either channel closing ends the session: close the other one too.
        for conn in (session.sync, session.async_channel):
            if conn is not None:
                _close(conn)

    # -- the synchronous channel -------------------------------------------------------------

    def _sync_loop(self, session: _Session) -> None:
        conn = session.sync
        pending = bytearray()
        while not self._stop.is_set():
            kind, control, parameter, length = self._header(conn)
            if length > SERVER_MAX_MESSAGE:
                self._discard(conn, length)
                _send(conn, ERROR, ERROR_TOO_LARGE, 0, b"message larger than the maximum size")
                continue
            payload = self._exact(conn, length)
            if kind in (DATA, DATA_END):
                if session.clearing.is_set():
                    continue            # between a device clear and its completion: discarded
                pending += payload
                if len(pending) > SERVER_MAX_MESSAGE:
                    self.instrument.push_error(-363)   # input buffer overrun
                    pending.clear()
                    continue
                if kind == DATA_END:
                    message = bytes(pending).decode("ascii", "replace").strip("\r\n ")
                    pending.clear()
                    if message and not self._handle_sync(session, message, parameter):
                        return
            elif kind == DEVICE_CLEAR_COMPLETE:
                # The device clear proper: input and output of the session are gone.
                pending.clear()
                session.clearing.clear()
                with session.send_lock:
                    _send(conn, DEVICE_CLEAR_ACKNOWLEDGE, 0, 0)
            elif kind == TRIGGER:
                continue                # no trigger model in the simulated instruments
            else:
                with session.send_lock:
                    _send(conn, ERROR, ERROR_UNRECOGNIZED_TYPE, 0, f"message type {kind}".encode())

    def _handle_sync(self, session: _Session, message: str, message_id: int) -> bool:
        def wait_latency(model_s: float) -> str:
            # A device clear ends the wait and the reply is never sent; a closed session ends.
            if session.clearing.wait(model_s / self.clock.speed):
                return SKIP
            return CLOSE if _peer_closed(session.sync) else SEND

        def send(data: bytes) -> bool:
            # IEEE 488.2 ends a response with a newline; HiSLIP's DataEnd carries the END.
            return self._send_reply(session, message_id, data + b"\n")

        return serve_message(self.instrument, self.faults, message, wait_latency, send,
                             self._record(message))

    def _send_reply(self, session: _Session, message_id: int, data: bytes) -> bool:
        """Data messages of at most the client's maximum size, the last one a DataEnd."""
        room = max(1, session.client_max_message - HEADER.size)
        view = memoryview(data)
        try:
            with session.send_lock:
                while True:
                    if session.clearing.is_set():
                        return True     # cleared while sending: the rest is discarded
                    chunk, view = view[:room], view[room:]
                    _send(session.sync, DATA_END if not view else DATA, 0, message_id, chunk)
                    if not view:
                        return True
        except OSError:
            return False

    # -- the asynchronous channel ------------------------------------------------------------

    def _async_loop(self, session: _Session) -> None:
        conn = session.async_channel
        assert conn is not None
        while not self._stop.is_set():
            kind, control, parameter, length = self._header(conn)
            payload = self._exact(conn, min(length, SERVER_MAX_MESSAGE))
            self._discard(conn, length - len(payload))
            if kind == ASYNC_MAX_MSG_SIZE and len(payload) == 8:
                session.client_max_message = max(HEADER.size + 1, struct.unpack("!Q", payload)[0])
                _send(conn, ASYNC_MAX_MSG_SIZE_RESPONSE, 0, 0, struct.pack("!Q", SERVER_MAX_MESSAGE))
            elif kind == ASYNC_DEVICE_CLEAR:
                session.clearing.set()      # abandon the reply being prepared or sent
                _send(conn, ASYNC_DEVICE_CLEAR_ACKNOWLEDGE, 0, 0)   # feature bits: none
            elif kind == ASYNC_STATUS_QUERY:
                _send(conn, ASYNC_STATUS_RESPONSE, self.instrument.status_byte() & 0xFF, 0)
            elif kind == ASYNC_LOCK:
                _send(conn, ASYNC_LOCK_RESPONSE, self._lock(session, control == 1), 0)
            elif kind == ASYNC_LOCK_INFO:
                with self._guard:
                    held = self._lock_owner is not None
                _send(conn, ASYNC_LOCK_INFO_RESPONSE, int(held), int(held))
            elif kind == ASYNC_REMOTE_LOCAL_CONTROL:
                _send(conn, ASYNC_REMOTE_LOCAL_RESPONSE, 0, 0)
            else:
                _send(conn, ERROR, ERROR_UNRECOGNIZED_TYPE, 0, f"message type {kind}".encode())

    def _lock(self, session: _Session, request: bool) -> int:
        with self._guard:
            if request:
                if self._lock_owner in (None, session.session_id):
                    self._lock_owner = session.session_id
                    return LOCK_SUCCESS
                return LOCK_FAILURE
            if self._lock_owner == session.session_id:
                self._lock_owner = None
                return LOCK_SUCCESS
            return LOCK_ERROR           # releasing a lock this session does not hold

    # -- framing -------------------------------------------------------------------------

    def _header(self, conn: socket.socket) -> tuple[int, int, int, int]:
        prologue, kind, control, parameter, length = HEADER.unpack(self._exact(conn, HEADER.size))
        if prologue != PROLOGUE:
            _send(conn, FATAL_ERROR, FATAL_BAD_HEADER, 0, b"poorly formed message header")
            raise _Closed
        return kind, control, parameter, length

    def _exact(self, conn: socket.socket, count: int) -> bytes:
        data = bytearray()
        while len(data) < count:
            if self._stop.is_set():
                raise _Closed
            try:
                chunk = conn.recv(min(count - len(data), 1 << 16))
            except TimeoutError:
                continue
            if not chunk:
                raise _Closed
            data += chunk
        return bytes(data)

    def _discard(self, conn: socket.socket, count: int) -> None:
        while count > 0:
            count -= len(self._exact(conn, min(count, 1 << 16)))


def _send(conn: socket.socket, kind: int, control: int, parameter: int, payload: bytes | memoryview = b"") -> None:
    conn.sendall(HEADER.pack(PROLOGUE, kind, control, parameter & 0xFFFF_FFFF, len(payload)) + bytes(payload))

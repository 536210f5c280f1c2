"""VXI-11 server of one simulated instrument: the core channel only, on an ordinary port.

VXI-11 is ONC RPC (RFC 5531) over TCP with record marking and XDR encoding (RFC 4506).
A VXI-11 client normally asks the portmapper on port 111 where the device core program
(0x0607AF, version 1) listens; port 111 is privileged and belongs to the machine's rpcbind,
so this server does not register there. pyvisa-py skips the portmapper when the resource
names the port: ``TCPIP0::127.0.0.1,PORT::inst0::INSTR``; other VISA libraries cannot reach
this server.

Served: create_link, device_write (a message ends with the END flag), device_read (waits up
to the call's io_timeout, then error 15), device_readstb, device_clear (pending input and
output are discarded, a held-back reply is never sent), destroy_link; trigger, remote,
local, lock and unlock answer "no error" and do nothing. Not served: the abort channel,
interrupts (the interrupt channel), create_intr_chan, device_docmd.
"""

from __future__ import annotations

import queue
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
    serve_message,
)

DEVICE_CORE_PROG, DEVICE_CORE_VERS = 0x0607AF, 1
CREATE_LINK, DEVICE_WRITE, DEVICE_READ, DEVICE_READSTB = 10, 11, 12, 13
DEVICE_TRIGGER, DEVICE_CLEAR, DEVICE_REMOTE, DEVICE_LOCAL = 14, 15, 16, 17
DEVICE_LOCK, DEVICE_UNLOCK, DESTROY_LINK = 18, 19, 23
OP_FLAG_END = 8
RX_REQCNT, RX_END = 1, 4
ERR_NONE, ERR_SYNTAX, ERR_INVALID_LINK, ERR_IO_TIMEOUT = 0, 1, 4, 15
MAX_RECV_SIZE = 1 << 20
CALL, REPLY = 0, 1
MSG_ACCEPTED, SUCCESS, PROG_UNAVAIL, PROC_UNAVAIL = 0, 0, 1, 3


class _Closed(Exception):
    pass


@dataclass
class _Link:
    """One VXI-11 link: its pending output and a worker that runs its messages in order."""

    link_id: int
    inbox: queue.Queue = field(default_factory=queue.Queue)
    output: bytearray = field(default_factory=bytearray)
    ready: threading.Condition = field(default_factory=threading.Condition)
    generation: int = 0          # bumped by device_clear: older replies are dropped
    cleared: threading.Event = field(default_factory=threading.Event)
    pending: bytearray = field(default_factory=bytearray)
    closed: bool = False
    conn: socket.socket | None = None   # closed by a drop fault


class Vxi11Server(InstrumentServer):
    def __init__(self, instrument: Instrument, faults: FaultSettings, clock: ModelClock,
                 host: str = "127.0.0.1", port: int = 0,
                 log: Callable[[CommandRecord], None] | None = None,
                 device: str = "inst0") -> None:
        super().__init__(instrument, faults, clock, host, port, log)
        self.device = device
        self._next_link = 1

    @property
    def resource(self) -> str:
        return f"TCPIP0::{self.host},{self.port}::{self.device}::INSTR"

    def _serve(self, conn: socket.socket) -> None:
        links: dict[int, _Link] = {}
        try:
            while not self._stop.is_set():
                record = self._record_in(conn)
                reply = self._call(record, links, conn)
                if reply is None:
                    return
                conn.sendall(struct.pack(">I", 0x8000_0000 | len(reply)) + reply)
        except (_Closed, OSError, struct.error):
            pass
        finally:
            for link in links.values():
                self._end(link)
            with self._guard:
                self._connections.discard(conn)
            _close(conn)

    # -- RPC -------------------------------------------------------------------------------

    def _record_in(self, conn: socket.socket) -> bytes:
        data = bytearray()
        while True:
            (mark,) = struct.unpack(">I", self._exact(conn, 4))
            data += self._exact(conn, mark & 0x7FFF_FFFF)
            if mark & 0x8000_0000:
                return bytes(data)

    def _call(self, record: bytes, links: dict[int, _Link], conn: socket.socket) -> bytes | None:
        xid, kind, _, prog, vers, proc = struct.unpack(">6I", record[:24])
        reader = _Xdr(record, 24)
        for _ in range(2):                      # credentials and verifier: flavour, opaque
            reader.uint()
            reader.opaque()
        head = struct.pack(">6I", xid, REPLY, MSG_ACCEPTED, 0, 0, 0)
        if kind != CALL or prog != DEVICE_CORE_PROG or vers != DEVICE_CORE_VERS:
            return head[:-4] + struct.pack(">I", PROG_UNAVAIL)
        if proc == CREATE_LINK:
            return head + self._create_link(reader, links, conn)
        handler: Callable[[_Xdr, dict[int, _Link]], bytes | None] | None = {
            DEVICE_WRITE: self._write, DEVICE_READ: self._read,
                   DEVICE_READSTB: self._readstb, DEVICE_CLEAR: self._clear,
                   DESTROY_LINK: self._destroy}.get(proc)
        if handler is None:
            if proc in (DEVICE_TRIGGER, DEVICE_REMOTE, DEVICE_LOCAL, DEVICE_LOCK, DEVICE_UNLOCK):
                return head + struct.pack(">I", ERR_NONE)
            return head[:-4] + struct.pack(">I", PROC_UNAVAIL)
        result = handler(reader, links)
        return None if result is None else head + result

    def _create_link(self, reader: _Xdr, links: dict[int, _Link], conn: socket.socket) -> bytes:
        reader.uint()                           # client id
        reader.uint()                           # lock device
        reader.uint()                           # lock timeout
        device = reader.opaque().decode("ascii", "replace")
        if device.lower() != self.device.lower():
            return struct.pack(">4I", ERR_SYNTAX, 0, 0, 0)
        with self._guard:
            link = _Link(self._next_link, conn=conn)
            self._next_link += 1
        links[link.link_id] = link
        threading.Thread(target=self._worker, args=(link,), daemon=True,
                         name=f"sim-{self.instrument.role}-vxi11").start()
        return struct.pack(">4I", ERR_NONE, link.link_id, 0, MAX_RECV_SIZE)

    def _write(self, reader: _Xdr, links: dict[int, _Link]) -> bytes | None:
        link = links.get(reader.uint())
        reader.uint()                           # io timeout
        reader.uint()                           # lock timeout
        flags = reader.uint()
        data = reader.opaque()
        if link is None:
            return struct.pack(">2I", ERR_INVALID_LINK, 0)
        link.pending += data
        if flags & OP_FLAG_END:
            message = bytes(link.pending).decode("ascii", "replace").strip("\r\n ")
            link.pending.clear()
            if message:
                link.inbox.put((link.generation, message))
        return struct.pack(">2I", ERR_NONE, len(data))

    def _read(self, reader: _Xdr, links: dict[int, _Link]) -> bytes:
        link = links.get(reader.uint())
        request = reader.uint()
        io_timeout_s = reader.uint() / 1000.0
        if link is None:
            return struct.pack(">3I", ERR_INVALID_LINK, 0, 0)
        with link.ready:
            if not link.ready.wait_for(lambda: bool(link.output) or link.closed, io_timeout_s):
                return struct.pack(">3I", ERR_IO_TIMEOUT, 0, 0)
            chunk = bytes(link.output[:max(1, request)])
            del link.output[:len(chunk)]
            reason = RX_END if not link.output else RX_REQCNT
        return struct.pack(">3I", ERR_NONE, reason, len(chunk)) + _pad(chunk)

    def _readstb(self, reader: _Xdr, links: dict[int, _Link]) -> bytes:
        return struct.pack(">2I", ERR_NONE, self.instrument.status_byte() & 0xFF)

    def _clear(self, reader: _Xdr, links: dict[int, _Link]) -> bytes:
        link = links.get(reader.uint())
        if link is None:
            return struct.pack(">I", ERR_INVALID_LINK)
        with link.ready:
            link.generation += 1
            link.cleared.set()                  # a reply held back by a latency is dropped
            link.output.clear()
            link.pending.clear()
        return struct.pack(">I", ERR_NONE)

    def _destroy(self, reader: _Xdr, links: dict[int, _Link]) -> bytes:
        link = links.pop(reader.uint(), None)
        if link is not None:
            self._end(link)
        return struct.pack(">I", ERR_NONE)

    def _end(self, link: _Link) -> None:
        with link.ready:
            link.closed = True
            link.ready.notify_all()
        link.cleared.set()
        link.inbox.put(None)

    # -- the link's messages, in order -------------------------------------------------------

    def _worker(self, link: _Link) -> None:
        while True:
            item = link.inbox.get()
            if item is None or link.closed:
                return
            generation, message = item
            if generation != link.generation:
                continue                        # sent before a device clear: discarded
            link.cleared.clear()

            def wait_latency(model_s: float, generation: int = generation) -> str:
                link.cleared.wait(model_s / self.clock.speed)
                if link.closed:
                    return CLOSE
                return SKIP if link.generation != generation else SEND

            def send(data: bytes, generation: int = generation) -> bool:
                with link.ready:
                    if link.generation == generation and not link.closed:
                        link.output += data + b"\n"   # VXI-11's END comes with the last byte
                        link.ready.notify_all()
                return True

            if not serve_message(self.instrument, self.faults, message, wait_latency, send,
                                 self._record(message)):
                self._end(link)
                if link.conn is not None:
                    _close(link.conn)           # an injected drop: the connection goes
                return

    def _exact(self, conn: socket.socket, count: int) -> bytes:
        data = bytearray()
        while len(data) < count:
            if self._stop.is_set():
                raise _Closed
            try:
                chunk = conn.recv(count - len(data))
            except TimeoutError:
                continue
            if not chunk:
                raise _Closed
            data += chunk
        return bytes(data)


class _Xdr:
    """Reads XDR unsigned integers and variable-length opaques from a buffer."""

    def __init__(self, data: bytes, offset: int) -> None:
        self.data, self.offset = data, offset

    def uint(self) -> int:
        (value,) = struct.unpack_from(">I", self.data, self.offset)
        self.offset += 4
        return value

    def opaque(self) -> bytes:
        length = self.uint()
        value = self.data[self.offset:self.offset + length]
        self.offset += (length + 3) // 4 * 4
        return value


def _pad(data: bytes) -> bytes:
    return data + b"\0" * (-len(data) % 4)

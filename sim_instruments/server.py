"""TCP server of one simulated instrument: newline-terminated messages in, replies out.

One thread accepts; each connection gets its own thread, so several DMMs can integrate at
once. Faults (latency, timeouts, dropped connections, garbage) are applied here, around the
instrument's own message processing. After a dropped connection the server keeps accepting.
"""

from __future__ import annotations

import select
import socket
import threading
import time
from collections.abc import Callable
from dataclasses import dataclass

from sim_instruments.clock import ModelClock
from sim_instruments.faults import FaultSettings
from sim_instruments.instrument import Instrument

MAX_MESSAGE_BYTES = 1 << 16
SEND, SKIP, CLOSE = "send", "skip", "close"   # what becomes of a reply after a latency


@dataclass(frozen=True)
class CommandRecord:
    role: str
    model_time: float
    wall_time: float
    message: str
    reply: str | None


class InstrumentServer:
    def __init__(self, instrument: Instrument, faults: FaultSettings, clock: ModelClock,
                 host: str = "127.0.0.1", port: int = 0,
                 log: Callable[[CommandRecord], None] | None = None) -> None:
        self.instrument = instrument
        self.faults = faults
        self.clock = clock
        self.log = log
        self._listener = socket.create_server((host, port))
        self._listener.settimeout(0.2)
        self.host, self.port = self._listener.getsockname()[:2]
        self._stop = threading.Event()
        self._threads: list[threading.Thread] = []
        self._connections: set[socket.socket] = set()
        self._guard = threading.Lock()

    def start(self) -> None:
        thread = threading.Thread(target=self._accept_loop, daemon=True,
                                  name=f"sim-{self.instrument.role}-accept")
        thread.start()
        self._threads.append(thread)

    def stop(self) -> None:
        self.close()
        self.join()

    def close(self) -> None:
        """Stop accepting and close every connection (threads notice within 0.2 s)."""
        self._stop.set()
        self._listener.close()
        with self._guard:
            for conn in list(self._connections):
                _close(conn)

    def join(self) -> None:
        for thread in list(self._threads):
            thread.join(timeout=2.0)

    def _accept_loop(self) -> None:
        while not self._stop.is_set():
            try:
                conn, _ = self._listener.accept()
            except TimeoutError:
                continue
            except OSError:
                return
            conn.settimeout(0.2)
            conn.setsockopt(socket.IPPROTO_TCP, socket.TCP_NODELAY, 1)
            with self._guard:
                self._connections.add(conn)
            thread = threading.Thread(target=self._serve, args=(conn,), daemon=True,
                                      name=f"sim-{self.instrument.role}-conn")
            thread.start()
            self._threads = [t for t in self._threads if t.is_alive()] + [thread]

    def _serve(self, conn: socket.socket) -> None:
        buffer = b""
        try:
            while not self._stop.is_set():
                try:
                    chunk = conn.recv(4096)
                except TimeoutError:
                    continue
                except OSError:
                    return
                if not chunk:
                    return
                buffer += chunk
                if len(buffer) > MAX_MESSAGE_BYTES and b"\n" not in buffer:
                    self.instrument.push_error(-363)  # input buffer overrun
                    buffer = b""
                while b"\n" in buffer:
                    line, buffer = buffer.split(b"\n", 1)
                    message = line.decode("ascii", "replace").strip("\r ").rstrip()
                    if message and not self._handle(conn, message):
                        return
        finally:
            with self._guard:
                self._connections.discard(conn)
            _close(conn)

    def _handle(self, conn: socket.socket, message: str) -> bool:
        """Serve one message; False when the connection must close."""

        def wait_latency(model_s: float) -> str:
            self.clock.sleep(model_s)
            # The client gave up waiting and closed the session: the instrument drops the
            # rest of that session's input instead of running it later.
            return CLOSE if _peer_closed(conn) else SEND

        def send(data: bytes) -> bool:
            try:
                conn.sendall(data + b"\n")   # a raw socket has no END: the newline ends a reply
            except OSError:
                return False
            return True

        return serve_message(self.instrument, self.faults, message, wait_latency, send,
                             self._record(message))

    def _record(self, message: str) -> Callable[[str | None], None]:
        def record(sent: str | None) -> None:
            if self.log is not None:
                self.log(CommandRecord(self.instrument.role, self.clock.now(), time.time(),
                                       message, sent))
        return record


def serve_message(instrument: Instrument, faults: FaultSettings, message: str,
                  wait_latency: Callable[[float], str], send: Callable[[bytes], bool],
                  record: Callable[[str | None], None]) -> bool:
    """Run one message with the instrument's faults around it, whatever the transport.

    `wait_latency(model_s)` waits out an injected latency and says what became of the reply
    meanwhile: SEND it, SKIP it (the device was cleared) or CLOSE (the client went away); `send(data)` frames
    and sends one reply (False: the connection failed). False when the connection must close.
    Replies are text, except binary blocks carried one byte per character (latin-1)."""
    if faults.drop_now():
        return False
    drop_armed = faults.drop_after is not None
    reply = instrument.process(message)
    sent = reply
    if reply is not None:
        if faults.take_timeout():
            sent = None
        else:
            outcome = wait_latency(faults.latency_s) if faults.latency_s > 0 else SEND
            if outcome == CLOSE:
                return False
            if outcome == SKIP:
                record(None)
                return True
            data = faults.garble(reply) if faults.take_garbage() else reply.encode("latin-1")
            if not send(data):
                return False
    record(sent)
    return not faults.count_message(drop_armed)


def _peer_closed(conn: socket.socket) -> bool:
    """True once the client has closed its end (nothing more to read, ever)."""
    try:
        readable, _, _ = select.select([conn], [], [], 0)
        return bool(readable) and conn.recv(1, socket.MSG_PEEK) == b""
    except (OSError, ValueError):
        return True


def _close(conn: socket.socket) -> None:
    try:
        conn.shutdown(socket.SHUT_RDWR)
    except OSError:
        pass
    conn.close()

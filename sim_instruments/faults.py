"""Injected faults of one simulated instrument (all off by default).

The server consults these around every message; the SIMulation:FAULt commands and the
Python API (SimBench.faults(role)) change the same object.
"""

from __future__ import annotations

import threading
from collections.abc import Callable
from dataclasses import dataclass, field

import numpy as np


@dataclass
class FaultSettings:
    latency_s: float = 0.0        # model seconds added before every reply
    timeout_next: int = 0         # the next n queries get no reply
    drop_after: int | None = None  # close the connection after n more messages
    garbage_next: int = 0         # the next n replies are garbled
    # Instrument faults, for the bench self-test (station bench check) to find:
    stuck_relay: int | None = None  # switch: this relay never closes
    offset_v: float = 0.0         # dmm: added to every reading
    readback_v: float = 0.0       # supply: added to every MEASure:VOLTage? reply
    ignore_reset: bool = False    # *RST does nothing
    output_stuck_on: bool = False  # supply, force: an output once on stays on
    seed: int = 0
    _push: Callable[[int], None] | None = field(default=None, repr=False)
    _lock: threading.Lock = field(default_factory=threading.Lock, repr=False)
    _rng: np.random.Generator | None = field(default=None, repr=False)

    def push_error(self, code: int) -> None:
        """Queue SCPI error `code` on the instrument's error queue."""
        if self._push is None:
            raise RuntimeError("fault settings not attached to an instrument")
        self._push(code)

    def clear(self) -> None:
        with self._lock:
            self.latency_s = 0.0
            self.timeout_next = 0
            self.drop_after = None
            self.garbage_next = 0
            self.stuck_relay = None
            self.offset_v = 0.0
            self.readback_v = 0.0
            self.ignore_reset = False
            self.output_stuck_on = False

    # --- used by the server -------------------------------------------------------------
    def take_timeout(self) -> bool:
        with self._lock:
            if self.timeout_next > 0:
                self.timeout_next -= 1
                return True
            return False

    def take_garbage(self) -> bool:
        with self._lock:
            if self.garbage_next > 0:
                self.garbage_next -= 1
                return True
            return False

    def drop_now(self) -> bool:
        """True (and the fault cleared) if the connection must close before this message."""
        with self._lock:
            if self.drop_after is not None and self.drop_after <= 0:
                self.drop_after = None
                return True
            return False

    def count_message(self, armed_before: bool) -> bool:
        """Count one served message; True (fault cleared) when the connection must close now.

        `armed_before` keeps the message that armed the fault from counting itself."""
        with self._lock:
            if not armed_before or self.drop_after is None:
                return False
            self.drop_after -= 1
            if self.drop_after <= 0:
                self.drop_after = None
                return True
            return False

    def garble(self, reply: str) -> bytes:
        """A garbled reply: binary junk, non-numeric text, or a mangled copy of the reply."""
        with self._lock:
            if self._rng is None:
                self._rng = np.random.default_rng([self.seed, 77])
            kind = int(self._rng.integers(3))
            if kind == 0:
                junk = self._rng.integers(128, 256, size=12, dtype=np.uint8).tobytes()
                return junk
            if kind == 1:
                letters = self._rng.choice(list("#@!?%&QXZ~^"), size=10)
                return "".join(letters).encode("ascii")
            mangled = "".join("?" if c.isdigit() and self._rng.random() < 0.5 else c for c in reply)
            return (mangled[: max(1, len(mangled) // 2)] + "%$").encode("ascii", "replace")

"""Base of every simulated instrument: IEEE 488.2 common commands, error queue, status
registers, SYSTem:ERRor and the SIMulation:FAULt subsystem.

A failing query gives no reply (as on real SCPI instruments); the error is queued and
read back with SYSTem:ERRor?.
"""

from __future__ import annotations

import threading
from collections import deque
from functools import partial

from sim_instruments.clock import ModelClock
from sim_instruments.dialect import (
    BOOLEAN_FORMS,
    ERROR_FORMS,
    NUMBER_FORMS,
    OVERLOAD_FORMS,
    Dialect,
)
from sim_instruments.faults import FaultSettings
from sim_instruments.scpi_errors import ScpiError, error_text
from sim_instruments.scpi_params import Arguments, boolean, choice, integer, number
from sim_instruments.scpi_tree import CommandTree

MAKER = "AMPSCREEN-SIM"  # our simulated bench; an invented maker name
FIRMWARE = "1.0"
ERROR_QUEUE_DEPTH = 16

# Event status register bits (IEEE 488.2, 11.5.1)
ESR_OPC, ESR_QYE, ESR_DDE, ESR_EXE, ESR_CME = 1, 4, 8, 16, 32
STB_EAV, STB_ESB = 4, 32  # error/event queue not empty; event summary


def esr_bit_for(code: int) -> int:
    if -200 < code <= -100:
        return ESR_CME
    if -300 < code <= -200:
        return ESR_EXE
    if -400 < code <= -300 or code > 0:
        return ESR_DDE
    if -500 < code <= -400:
        return ESR_QYE
    return 0


class ErrorQueue:
    """SCPI error queue, depth 16: when full the newest entry becomes -350 Queue overflow."""

    def __init__(self, depth: int = ERROR_QUEUE_DEPTH) -> None:
        self.depth = depth
        self._queue: deque[int] = deque()

    def push(self, code: int) -> None:
        if len(self._queue) < self.depth:
            self._queue.append(code)
        else:
            self._queue[-1] = -350

    def pop(self) -> int:
        return self._queue.popleft() if self._queue else 0

    def clear(self) -> None:
        self._queue.clear()

    def __len__(self) -> int:
        return len(self._queue)


class Instrument:
    """One SCPI instrument. Subclasses add their commands in `build` and defaults in `reset`."""

    model_name = "AS-0"

    def __init__(self, role: str, serial: str, clock: ModelClock, faults: FaultSettings) -> None:
        self.role = role
        self.serial = serial
        self.clock = clock
        self.faults = faults
        self.dialect = Dialect()   # how replies are written; SIMulation:DIALect changes it
        faults._push = self.push_error
        self.lock = threading.RLock()  # one message at a time, as on a real instrument
        self.errors = ErrorQueue()
        self.esr = 0
        self.ese = 0xFF  # every event is summarised in STB bit 5 (documented choice)
        self.tree = CommandTree()
        self._add_common()
        self._add_simulation()
        self.build(self.tree)
        self.reset()

    # --- to override ---------------------------------------------------------------------
    def build(self, tree: CommandTree) -> None:
        """Register the instrument's own commands."""

    def reset(self) -> None:
        """*RST defaults."""

    def wait_pending(self) -> None:
        """Block until operations started earlier are done (for *OPC?, *WAI)."""

    # --- message processing --------------------------------------------------------------
    def process(self, message: str) -> str | None:
        """Run one program message; the reply line (without terminator) or None."""
        with self.lock:
            replies = self.tree.run_message(message, self._on_error)
        return ";".join(replies) if replies else None

    def idn(self) -> str:
        return f"{MAKER},{self.model_name},{self.serial},{FIRMWARE}"

    def push_error(self, code: int) -> None:
        with self.lock:
            self.errors.push(code)
            self.esr |= esr_bit_for(code)

    def _on_error(self, exc: ScpiError) -> None:
        self.push_error(exc.code)

    def status_byte(self) -> int:
        stb = STB_EAV if len(self.errors) else 0
        if self.esr & self.ese:
            stb |= STB_ESB
        return stb

    # --- common commands and system errors ------------------------------------------------
    def _add_common(self) -> None:
        tree = self.tree
        tree.add_common("*IDN?", self.idn)
        tree.add_common("*RST", self._rst)
        tree.add_common("*CLS", self._cls)
        tree.add_common("*OPC?", self._opc_query)
        tree.add_common("*OPC", self._opc)
        tree.add_common("*WAI", self._wai)
        tree.add_common("*ESR?", self._esr_query)
        tree.add_common("*ESE", self._ese, Arguments([integer(0, 255)]))
        tree.add_common("*ESE?", lambda: str(self.ese))
        tree.add_common("*STB?", lambda: str(self.status_byte()))
        tree.add_common("*TST?", lambda: "0")
        tree.add("SYSTem:ERRor[:NEXT]", query=self._error_next)
        tree.add("SYSTem:ERRor:COUNt", query=lambda: str(len(self.errors)))

    def _rst(self) -> None:
        self.wait_pending()
        if not self.faults.ignore_reset:
            self.reset()

    def _cls(self) -> None:
        self.errors.clear()
        self.esr = 0

    def _opc_query(self) -> str:
        self.wait_pending()
        return "1"

    def _opc(self) -> None:
        self.wait_pending()
        self.esr |= ESR_OPC

    def _wai(self) -> None:
        self.wait_pending()

    def _esr_query(self) -> str:
        value, self.esr = self.esr, 0
        return str(value)

    def _ese(self, value: int) -> None:
        self.ese = value

    def _error_next(self) -> str:
        code = self.errors.pop()
        return self.dialect.error_entry(code, error_text(code))

    # --- SIMulation:FAULt ----------------------------------------------------------------
    def _add_simulation(self) -> None:
        tree = self.tree
        faults = self.faults
        count = Arguments([integer(0, 1_000_000)])

        def set_latency(seconds: float) -> None:
            faults.latency_s = seconds

        def set_timeout(n: int) -> None:
            faults.timeout_next = n

        def set_drop(n: int) -> None:
            faults.drop_after = n

        def set_garbage(n: int) -> None:
            faults.garbage_next = n

        def push(code: int) -> None:
            self.push_error(code)

        tree.add("SIMulation:FAULt:LATency", set_latency, lambda: self.dialect.number(faults.latency_s),
                 args=Arguments([number("S", 0.0, 60.0)]))
        tree.add("SIMulation:FAULt:TIMEout", set_timeout, lambda: str(faults.timeout_next),
                 args=count)
        tree.add("SIMulation:FAULt:DROP", set_drop, args=count)
        tree.add("SIMulation:FAULt:GARBage", set_garbage, lambda: str(faults.garbage_next),
                 args=count)
        tree.add("SIMulation:FAULt:ERRor", push, args=Arguments([integer(-999, 999)]))
        tree.add("SIMulation:FAULt:CLEar", faults.clear)
        tree.add("SIMulation:FAULt:STUCk", partial(setattr, faults, "stuck_relay"),
                 args=Arguments([integer(0, 999)]))
        tree.add("SIMulation:FAULt:OFFSet", partial(setattr, faults, "offset_v"),
                 args=Arguments([number("V", -10.0, 10.0)]))
        tree.add("SIMulation:FAULt:READback", partial(setattr, faults, "readback_v"),
                 args=Arguments([number("V", -10.0, 10.0)]))
        tree.add("SIMulation:FAULt:NORESet", partial(setattr, faults, "ignore_reset"),
                 args=Arguments([boolean]))
        tree.add("SIMulation:FAULt:HOT", partial(setattr, faults, "output_stuck_on"),
                 args=Arguments([boolean]))
        dialect = self.dialect
        for header, attribute, forms in (("NUMBer", "number_form", NUMBER_FORMS),
                                         ("OVERload", "overload_form", OVERLOAD_FORMS),
                                         ("BOOLean", "boolean_form", BOOLEAN_FORMS),
                                         ("ERRor", "error_form", ERROR_FORMS)):
            keywords = [_keyword(form) for form in forms]
            tree.add(f"SIMulation:DIALect:{header}", partial(setattr, dialect, attribute),
                     partial(getattr, dialect, attribute), args=Arguments([choice(*keywords)]))


def _keyword(form: str) -> str:
    """'SCIENTIFIC' -> 'SCIentific': SCPI's short form is the first four letters here."""
    return form[:4] + form[4:].lower()

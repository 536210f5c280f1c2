"""A simulated digital I/O instrument, and a part handler wired to it by a handshake.

The DIO instrument has 48 output lines and 16 input lines, read and written as words:
``SOURce:DIGital:DATA <n>`` / ``SOURce:DIGital:DATA?`` (outputs), ``SENSe:DIGital:DATA?``
(inputs); ``*RST`` drives every output low.

The handshake (our simulated handler's wiring, in the way parallel handler interfaces
usually work; common practice, no source):

- handler -> tester (DIO inputs): bit k-1 is start-of-test (SOT) of site k, high while a part
  sits there ready to test; bit 4 is end-of-lot, high once every part has been sorted;
- tester -> handler (DIO outputs): bits 8(k-1) .. 8(k-1)+6 carry site k's hard bin (1-99) in
  binary; bit 8(k-1)+7 is site k's re-seat request (a rising edge lifts and re-seats that
  part: SOT of that site drops until the part is back); bit 32 is end-of-test (EOT), whose
  rising edge sorts every seated part to the bin on its lines and indexes the next parts.

The handler checks the tester's timing as a real one would: the bin lines must be steady for
MIN_SETTLE_S before EOT rises, and EOT must stay high for MIN_STROBE_S (model seconds);
each breach is counted in `violations` (the bins are still taken as they stand).
"""

from __future__ import annotations

import threading
from collections.abc import Callable
from functools import partial

from sim_instruments.handler import END_OF_LOT, Handler
from sim_instruments.instrument import Instrument
from sim_instruments.scpi_errors import ScpiError
from sim_instruments.scpi_params import Arguments, integer
from sim_instruments.scpi_tree import CommandTree

EOT_BIT = 32
END_OF_LOT_BIT = 4
MIN_SETTLE_S = 0.5e-3
MIN_STROBE_S = 1e-3


def bin_shift(site: int) -> int:
    return 8 * (site - 1)


def reseat_bit(site: int) -> int:
    return 8 * (site - 1) + 7


class WiredHandler:
    """The simulated handler, driven by DIO lines instead of HANDler commands (same parts,
    same indexing and sorting: it works the `Handler` it wraps)."""

    def __init__(self, handler: Handler) -> None:
        self.handler = handler
        self.clock = handler.clock
        self.sot = [False] * handler.sites
        self.end_of_lot = False
        self.violations: list[str] = []
        self._started = False
        self._bins_changed_at = -1.0
        self._eot_rose_at: float | None = None
        self._lock = threading.Lock()
        self._busy: threading.Thread | None = None

    def inputs(self) -> int:
        with self._lock:
            if not self._started:
                self._started = True
                self._in_background(self._index)     # the first index, once the tester looks
            word = sum(1 << (k - 1) for k, on in enumerate(self.sot, start=1) if on)
            return word | (1 << END_OF_LOT_BIT if self.end_of_lot else 0)

    def outputs_changed(self, old: int, new: int) -> None:
        now = self.clock.now()
        with self._lock:
            bins_mask = sum(0x7F << bin_shift(k) for k in range(1, self.handler.sites + 1))
            if (old ^ new) & bins_mask:
                self._bins_changed_at = now
            rose, fell = new & ~old, old & ~new
            for site in range(1, self.handler.sites + 1):
                if rose >> reseat_bit(site) & 1 and self.sot[site - 1]:
                    self.sot[site - 1] = False
                    self._in_background(partial(self._reseat, site))
            if rose >> EOT_BIT & 1:
                if now - self._bins_changed_at < MIN_SETTLE_S:
                    self.violations.append(f"EOT {1e3 * (now - self._bins_changed_at):.3f} ms after "
                                           "the bin lines changed")
                self._eot_rose_at = now
                self._sort(new)
            if fell >> EOT_BIT & 1 and self._eot_rose_at is not None:
                width = now - self._eot_rose_at
                if width < MIN_STROBE_S:
                    self.violations.append(f"EOT strobe {1e3 * width:.3f} ms wide")
                self._eot_rose_at = None

    def _sort(self, word: int) -> None:
        handler = self.handler
        for site in range(1, handler.sites + 1):
            if handler.in_sites[site - 1] is None or not self.sot[site - 1]:
                continue
            code = word >> bin_shift(site) & 0x7F
            if not 1 <= code <= 99:
                self.violations.append(f"site {site} sorted with bin code {code}")
                code = 99
            with handler.lock:
                handler._bin(site, code)
        self.sot = [False] * handler.sites
        self._in_background(self._index)

    def _index(self) -> None:
        handler = self.handler
        try:
            with handler.lock:
                reply = handler._next()    # sorts the sites out, waits an index, seats the next
        except ScpiError as exc:           # a part left without a bin: the handler stops
            self.violations.append(f"handler stopped: {exc}")
            return
        with self._lock:
            if reply == END_OF_LOT:
                self.end_of_lot = True
            else:
                self.sot = [part is not None for part in handler.in_sites]

    def _reseat(self, site: int) -> None:
        with self.handler.lock:
            self.handler._reseat(site)
        with self._lock:
            self.sot[site - 1] = True

    def _in_background(self, work: Callable[[], None]) -> None:
        previous = self._busy

        def run() -> None:
            if previous is not None:
                previous.join()              # handler moves happen one after the other
            work()

        self._busy = threading.Thread(target=run, daemon=True, name="sim-wired-handler")
        self._busy.start()


class DigitalIo(Instrument):
    model_name = "ASD-3216"

    def __init__(self, wired: WiredHandler | None = None, **kwargs) -> None:
        self.wired = wired
        self.outputs = 0
        super().__init__(**kwargs)

    def reset(self) -> None:
        self._write(0)

    def build(self, tree: CommandTree) -> None:
        tree.add("[SOURce:]DIGital:DATA", self._write, lambda: str(self.outputs),
                 args=Arguments([integer(0, (1 << 48) - 1)]))
        tree.add("SENSe:DIGital:DATA", query=self._read)

    def _write(self, word: int) -> None:
        old, self.outputs = getattr(self, "outputs", 0), word
        if self.wired is not None:
            self.wired.outputs_changed(old, word)

    def _read(self) -> str:
        return str(self.wired.inputs() if self.wired is not None else 0)

"""A part handler wired to the station through a digital I/O instrument (a handshake of lines,
not a command protocol).

The lines (docs/transports.md shows the wiring): per site a start-of-test input (the handler
says a part is seated and ready), an end-of-lot input, per site seven bin output lines (the
hard bin in binary) and a re-seat output (output bits 8(k-1) .. 8(k-1)+7 for site k), and one
end-of-test (EOT) output strobe (bit 32) for the
whole index. The bench config gives the timing: how long the bin lines settle before EOT
rises, how long EOT stays high, how long to wait for start-of-test before giving up.

A handshake carries no part ids: the station numbers the parts it is given, in the order the
handler presents them, as ``<part_id_prefix><n, five digits>``.
"""

from __future__ import annotations

import time
from collections.abc import Callable
from dataclasses import dataclass

from drivers.errors import InstrumentBadReply, InstrumentTimeout, RequestRefused
from drivers.handler import _require_bin
from drivers.range_checks import require_site
from drivers.scpi_link import ScpiLink

EOT_BIT = 32
END_OF_LOT_BIT = 4
MAX_SITES = 4
POLL_S = 0.002          # how often the start-of-test lines are read while waiting


@dataclass(frozen=True)
class HandshakeTiming:
    strobe_s: float              # EOT (and re-seat) pulse width
    settle_s: float              # bin lines steady this long before EOT rises
    start_timeout_s: float       # longest wait for start-of-test (or end-of-lot)
    part_id_prefix: str = "P"


def bin_shift(site: int) -> int:
    return 8 * (site - 1)


def reseat_bit(site: int) -> int:
    return 8 * (site - 1) + 7


class DioHandshakeHandler:
    """The `PartHandler` of a handler wired through DIO lines."""

    def __init__(self, link: ScpiLink, sites: int, timing: HandshakeTiming) -> None:
        if not 1 <= sites <= MAX_SITES:
            raise RequestRefused(link.role, "sites", sites, f"1 to {MAX_SITES}")
        self.link = link
        self.timing = timing
        self._sites = sites
        self._seated: list[bool] | None = None   # the sites of the index under test
        self._bins: dict[int, int] = {}
        self._count = 0                          # parts presented so far (for their ids)

    @property
    def role(self) -> str:
        return self.link.role

    def sites(self) -> int:
        return self._sites

    def next_index(self) -> list[str | None] | None:
        """Strobe EOT for the index under test (its bins are on the lines), then wait for the
        handler's start-of-test lines; None once it raises end-of-lot."""
        if self._seated is not None and any(self._seated):
            self._end_of_test()
        word = self._wait_for(lambda w: bool(w & (self._sot_mask() | 1 << END_OF_LOT_BIT)),
                              "start-of-test or end-of-lot")
        if word >> END_OF_LOT_BIT & 1 and not word & self._sot_mask():
            self._seated = None
            return None
        self._seated = [bool(word >> (site - 1) & 1) for site in range(1, self._sites + 1)]
        self._bins = {}
        ids: list[str | None] = []
        for seated in self._seated:
            if seated:
                self._count += 1
                ids.append(f"{self.timing.part_id_prefix}{self._count:05d}")
            else:
                ids.append(None)
        return ids

    def assign_bin(self, site: int, hard_bin: int, label: str = "") -> None:
        """Put the bin on the site's lines (the handler takes it at the next EOT)."""
        site = require_site(self.role, site, self._sites)
        hard_bin = _require_bin(self.role, hard_bin)
        if self._seated is None or not self._seated[site - 1]:
            raise RequestRefused(self.role, "site", site, "a site the handler seated a part in")
        self._bins[site] = hard_bin
        self._write(self._bin_word())

    def reseat(self, site: int) -> None:
        """Pulse the site's re-seat line, then wait until its start-of-test is back."""
        site = require_site(self.role, site, self._sites)
        word = self._bin_word()
        self._write(word | 1 << reseat_bit(site))
        time.sleep(self.timing.strobe_s)
        self._write(word)
        self._wait_for(lambda w: bool(w >> (site - 1) & 1), f"start-of-test of site {site} after the re-seat")

    # -- the lines ------------------------------------------------------------------------

    def _end_of_test(self) -> None:
        assert self._seated is not None
        missing = [site for site, seated in enumerate(self._seated, start=1)
                   if seated and site not in self._bins]
        if missing:
            raise RequestRefused(self.role, "end of test", f"sites {missing} without a bin",
                                 "a bin for every seated part before the next index")
        word = self._bin_word()
        time.sleep(self.timing.settle_s)          # the bin lines have settled ...
        self._write(word | 1 << EOT_BIT)          # ... before EOT rises
        time.sleep(self.timing.strobe_s)
        self._write(word)
        self._seated = None

    def _bin_word(self) -> int:
        return sum(hard_bin << bin_shift(site) for site, hard_bin in self._bins.items())

    def _sot_mask(self) -> int:
        return (1 << self._sites) - 1

    def _write(self, word: int) -> None:
        self.link.write_and_wait(f"SOUR:DIG:DATA {word}")

    def _read(self) -> int:
        value = self.link.query_float("SENS:DIG:DATA?")
        if not value.is_integer() or not 0 <= value < 1 << 16:
            raise InstrumentBadReply(self.role, self.link.resource, "SENS:DIG:DATA?",
                                     f"returned {value:g}, not a 16-bit input word")
        return int(value)

    def _wait_for(self, ready: Callable[[int], bool], what: str) -> int:
        deadline = time.monotonic() + self.timing.start_timeout_s
        while True:
            word = self._read()
            if ready(word):
                return word
            if time.monotonic() > deadline:
                raise InstrumentTimeout(self.role, self.link.resource, "SENS:DIG:DATA?",
                                        f"no {what} from the handler within "
                                        f"{self.timing.start_timeout_s:g} s (handshake.start_timeout)")
            time.sleep(POLL_S)

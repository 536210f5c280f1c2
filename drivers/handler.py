"""Part handlers: something that seats parts in the sites and sorts them into bins.

`ScpiHandler` drives a handler over the HANDler commands; `ManualHandler` asks the operator
to do it. The sequencer sees only the `PartHandler` protocol.
"""

from __future__ import annotations

import re
from collections.abc import Callable
from typing import Protocol, runtime_checkable

from drivers.errors import InstrumentBadReply, InstrumentError, RequestRefused
from drivers.range_checks import require_site
from drivers.retry import RETRYABLE
from drivers.scpi_link import ScpiLink

MIN_BIN, MAX_BIN = 1, 99
EMPTY_SITE = "-"
# What a handler's part id may look like: a garbled reply must not pass for an id.
PART_ID = re.compile(r"[A-Za-z0-9][A-Za-z0-9_.:/+-]{0,63}")


@runtime_checkable
class PartHandler(Protocol):
    def sites(self) -> int:
        """Sites per index."""
        ...

    def next_index(self) -> list[str | None] | None:
        """Seat the next parts: one id per site (None for an empty site); None at the end of the lot."""
        ...

    def assign_bin(self, site: int, hard_bin: int, label: str = "") -> None:
        """Sort the part in `site` (1-based) to `hard_bin`."""
        ...

    def reseat(self, site: int) -> None:
        """Lift and re-seat the part in `site` (contact retest)."""
        ...


def _require_bin(role: str, hard_bin: int) -> int:
    if isinstance(hard_bin, bool) or not isinstance(hard_bin, int) or not MIN_BIN <= hard_bin <= MAX_BIN:
        raise RequestRefused(role, "hard bin", hard_bin, f"{MIN_BIN} to {MAX_BIN}")
    return hard_bin


class ScpiHandler:
    """A handler that understands the HANDler command set."""

    def __init__(self, link: ScpiLink) -> None:
        self.link = link
        self._sites: int | None = None
        self._last: list[str | None] | None = None   # the index NEXT? gave last

    @property
    def role(self) -> str:
        return self.link.role

    def sites(self) -> int:
        if self._sites is None:
            value = self.link.query_float("HAND:SIT?")
            if not value.is_integer() or not 1 <= value <= 4:
                raise InstrumentBadReply(self.role, self.link.resource, "HAND:SIT?",
                                         f"returned {value:g}, not a site count of 1 to 4")
            self._sites = int(value)
        return self._sites

    def next_index(self) -> list[str | None] | None:
        """HAND:NEXT? moves parts, so it is never simply sent again after a failure: the
        handler is asked what it has seated (HAND:IND?) and the index is taken from that."""
        try:
            return self._parse(self.link.query("HAND:NEXT?", retry=False), "HAND:NEXT?")
        except RETRYABLE as exc:
            return self._recover_next(exc)

    def seated(self) -> list[str | None]:
        """The ids seated now, without moving anything (HAND:IND?)."""
        ids = self._parse(self.link.query("HAND:IND?"), "HAND:IND?")
        return ids if ids is not None else [None] * self.sites()

    def _recover_next(self, first: InstrumentError) -> list[str | None] | None:
        # The failed NEXT? may have queued an error (-221, parts not yet binned): ours, cleared.
        self.link.write_and_wait("*CLS")
        seated = self.seated()
        if any(seated) and seated != self._last:
            self._last = seated
            return seated                      # the NEXT? was done: these are the new parts
        if not any(seated) and self.remaining() == 0:
            self._last = None
            return None                        # the NEXT? was done and ended the lot
        try:                                   # the NEXT? never arrived: send it once more
            return self._parse(self.link.query("HAND:NEXT?", retry=False), "HAND:NEXT?")
        except InstrumentError as again:
            raise InstrumentBadReply(self.role, self.link.resource, "HAND:NEXT?",
                                     f"failed twice ({first.detail}; then {again.detail})") from again

    def _parse(self, reply: str, command: str) -> list[str | None] | None:
        if reply.strip().upper() == "END":
            self._last = None
            return None
        ids: list[str | None] = [None if part.strip() == EMPTY_SITE else part.strip()
                                 for part in reply.split(",")]
        if len(ids) != self.sites() or any(p is not None and not PART_ID.fullmatch(p) for p in ids):
            raise InstrumentBadReply(self.role, self.link.resource, command,
                                     f"returned {reply!r}: expected {self.sites()} part ids "
                                     f"(letters, digits, _ . : / + -) or {EMPTY_SITE!r} for an empty site")
        if command == "HAND:NEXT?":
            self._last = ids
        return ids

    def assign_bin(self, site: int, hard_bin: int, label: str = "") -> None:
        site = require_site(self.role, site, self.sites())
        self.link.write_and_wait(f"HAND:BIN {site},{_require_bin(self.role, hard_bin)}")

    def reseat(self, site: int) -> None:
        # Wait for the re-seat to finish (*OPC?): measuring while the part is lifted reads an open.
        self.link.query(f"HAND:RES {require_site(self.role, site, self.sites())};*OPC?")

    def remaining(self) -> int:
        """Parts not yet presented."""
        return int(self.link.query_float("HAND:COUN?"))


class ManualHandler:
    """The operator seats the parts and types their ids; the station tells them the bin."""

    role = "handler"

    def __init__(self, sites: int, ask: Callable[[str], str], tell: Callable[[str], None],
                 seated: Callable[[int, str | None], None] | None = None) -> None:
        if not 1 <= sites <= 4:
            raise RequestRefused(self.role, "sites", sites, "1 to 4")
        self._sites = sites
        self._ask = ask
        self._tell = tell
        # Told of every seat the operator confirms (site, id or None for empty): the
        # simulated bench puts a part of its lot there; a real socket needs nothing.
        self._seated = seated
        self._tested: set[str] = set()
        self._current: list[str | None] = []

    def sites(self) -> int:
        return self._sites

    def next_index(self) -> list[str | None] | None:
        while True:
            index = self._ask_index()
            if index is None:
                return None
            if any(part is not None for part in index):
                self._tested.update(part for part in index if part is not None)
                self._current = index
                return index
            self._tell("No part seated in any site: seat at least one part, "
                       "or leave site 1 empty to end the lot.")

    def _ask_index(self) -> list[str | None] | None:
        index: list[str | None] = []
        for site in range(1, self._sites + 1):
            while True:
                answer = self._ask(self._prompt(site)).strip()
                problem = self._problem(site, answer, index)
                if problem is None:
                    break
                self._tell(problem)
            if site == 1 and answer == "":
                return None
            part = None if answer == EMPTY_SITE else answer
            if self._seated is not None:
                self._seated(site, part)
            index.append(part)
        return index

    def _prompt(self, site: int) -> str:
        if site == 1:
            extra = "press Enter with no id to end the lot"
        else:
            extra = f"type {EMPTY_SITE} to leave the site empty"
        if self._sites > 1 and site == 1:
            extra += f", {EMPTY_SITE} to leave it empty"
        # Sites are unpowered between indexes (station/lot/index_screen.py opens every relay).
        return (f"Seat a part in site {site} (site unpowered; ESD: wrist strap on, hold the part "
                f"by its body) and type its id ({extra})")

    def _problem(self, site: int, answer: str, index: list[str | None]) -> str | None:
        if answer == "":
            if site == 1:
                return None
            return (f"Site {site}: no id typed. Type the part's id, or {EMPTY_SITE} "
                    "if the site is left empty.")
        if answer == EMPTY_SITE:
            return None
        if not PART_ID.fullmatch(answer):
            return (f"Site {site}: {answer!r} is not a part id: use letters, digits and _ . : / + - "
                    "(no spaces or commas).")
        if answer in index:
            return f"Site {site}: {answer!r} is already seated in another site of this index."
        if answer in self._tested:
            return f"Site {site}: {answer!r} was already tested in this lot; check the id."
        return None

    def assign_bin(self, site: int, hard_bin: int, label: str = "") -> None:
        site = require_site(self.role, site, self._sites)
        _require_bin(self.role, hard_bin)
        part = self._current[site - 1] if site <= len(self._current) else None
        what = f"the part {part!r}" if part else "the part"
        suffix = f" ({label})" if label else ""
        self._tell(f"Site {site}: put {what} in bin {hard_bin}{suffix}.")

    def reseat(self, site: int) -> None:
        site = require_site(self.role, site, self._sites)
        self._ask(f"Site {site}: lift the part, seat it again and press Enter")

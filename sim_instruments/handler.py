"""Simulated part handler: indexes the lot's parts into the fixture sites and sorts them.

Parts come in lot order, one per site per index; each id is presented once. An index takes
`index_s` model seconds, during which the sites are empty. `skip_parts` starts the lot after
its first parts, as a handler does when a lot is resumed after those were sorted. A study
`plan` instead presents the same few parts index after index, each in every site
(sim_instruments/study_plan.py).
"""

from __future__ import annotations

from collections import Counter

from sim_instruments.fixture_faults import FixtureFault, contact_broken, leakage_a
from sim_instruments.instrument import Instrument
from sim_instruments.model import BenchModel
from sim_instruments.population import PartTruth
from sim_instruments.scpi_errors import ScpiError
from sim_instruments.scpi_params import Arguments, QuotedString, Token, integer
from sim_instruments.scpi_tree import CommandTree
from sim_instruments.study_plan import StudyPlan

EMPTY_SITE = "-"
END_OF_LOT = "END"


class Handler(Instrument):
    model_name = "ASH-40"

    def __init__(self, model: BenchModel, parts: list[PartTruth], index_s: float, skip_parts: int = 0,
                 plan: StudyPlan | None = None, fixture_faults: tuple[FixtureFault, ...] = (), seed: int = 0,
                 **kwargs) -> None:
        if skip_parts < 0:
            raise ValueError("skip_parts must be 0 or more")
        self.model = model
        self.parts = parts
        self.index_s = index_s
        self.next_part = min(skip_parts, len(parts))
        self.in_sites: list[PartTruth | None] = [None] * model.fixture.sites
        self.bins: Counter[int] = Counter()
        self.plan = plan
        self.next_index = 0          # study plan: the next index to present
        self.fixture_faults = fixture_faults
        self.seed = seed
        super().__init__(**kwargs)

    @property
    def sites(self) -> int:
        return self.model.fixture.sites

    def build(self, tree: CommandTree) -> None:
        site = integer(1, self.sites)
        tree.add("HANDler:SITes", query=lambda: str(self.sites))
        tree.add("HANDler:NEXT", query=self._next)
        tree.add("HANDler:INDex", query=self._seated)
        tree.add("HANDler:BIN", self._bin, args=Arguments([site, integer(1, 99)]))
        tree.add("HANDler:BIN:COUNt", query=lambda b: str(self.bins[b]),
                 query_args=Arguments([integer(1, 99)]))
        tree.add("HANDler:RESeat", self._reseat, args=Arguments([site]))
        tree.add("HANDler:COUNt", query=self._count)
        # A manual socket on the simulated bench: the operator seats the next part of the
        # simulated lot by hand, under the id they typed ("-" empties the site).
        tree.add("SIMulation:SEAT", self._seat_by_hand, args=Arguments([site, _quoted]))

    def _next(self) -> str:
        if self.plan is not None:
            return self._next_planned(self.plan)
        unbinned = [p for p in self.in_sites if p is not None and p.binned_hard_bin is None]
        if unbinned:
            raise ScpiError(-221, f"{unbinned[0].part_id} has no bin yet")
        if any(p is not None for p in self.in_sites):
            self._seat_all([None] * self.sites)  # sort the previous index out of the sites
        if self.next_part >= len(self.parts):
            return END_OF_LOT
        self.clock.sleep(self.index_s)
        batch = self.parts[self.next_part:self.next_part + self.sites]
        self.next_part += len(batch)
        self._seat_all(batch + [None] * (self.sites - len(batch)))
        return self._seated()

    def _next_planned(self, plan: StudyPlan) -> str:
        """A study: the plan's next index, the same parts again and again. A part the plan
        leaves in its site is not moved when the plan says not to re-seat."""
        unbinned = [p for p in self.in_sites if p is not None and p.binned_hard_bin is None]
        if unbinned:
            raise ScpiError(-221, f"{unbinned[0].part_id} has no bin yet")
        if self.next_index >= len(plan.indexes):
            if any(p is not None for p in self.in_sites):
                self._seat_all([None] * self.sites)
            return END_OF_LOT
        wanted = [self.parts[i] if i is not None else None for i in plan.indexes[self.next_index]]
        wanted += [None] * (self.sites - len(wanted))
        self.next_index += 1
        stays = [not plan.reseat and p is not None and p is self.in_sites[k]
                 for k, p in enumerate(wanted)]
        if not all(stays):
            self.clock.sleep(self.index_s)
        with self.model.lock:
            now = self.clock.now()
            for k, part in enumerate(wanted, start=1):
                if part is not None:
                    part.binned_hard_bin = None      # each presentation is binned anew
                if stays[k - 1]:
                    continue
                self.in_sites[k - 1] = part
                self.model.seat(k, part, now, contact=part is not None and part.defect != "open")
        return self._seated()

    def _seated(self) -> str:
        """The ids in the sites now, as NEXT? reported them (nothing moves)."""
        return ",".join(p.part_id if p else EMPTY_SITE for p in self.in_sites)

    def _seat_all(self, parts: list[PartTruth | None]) -> None:
        with self.model.lock:
            now = self.clock.now()
            for k, part in enumerate(parts, start=1):
                self.in_sites[k - 1] = part
                self.model.seat(k, part, now, contact=self._contact(k, part))

    def _count(self) -> str:
        if self.plan is not None:
            left = self.plan.indexes[self.next_index:]
            return str(sum(i is not None for index in left for i in index))
        return str(len(self.parts) - self.next_part)

    def _seat_by_hand(self, site: int, part_id: str) -> None:
        with self.model.lock:
            powered = self.model.op.powered[site - 1]
        if powered:
            raise ScpiError(-221, f"site {site} is powered: turn the rails off before seating a part")
        if part_id == EMPTY_SITE:
            self._seat_one(site, None)
            return
        if self.next_part >= len(self.parts):
            raise ScpiError(-221, "the simulated lot has no part left to seat")
        part = self.parts[self.next_part]
        self.next_part += 1
        part.part_id = part_id
        self._seat_one(site, part)

    def _seat_one(self, site: int, part: PartTruth | None) -> None:
        with self.model.lock:
            self.in_sites[site - 1] = part
            self.model.seat(site, part, self.clock.now(), contact=self._contact(site, part))

    def _contact(self, site: int, part: PartTruth | None) -> bool:
        """Whether the part in `site` is contacted; sets the site's fixture leakage for it."""
        if part is None:
            self.model.leak_a[site - 1] = 0.0
            return False
        self.model.leak_a[site - 1] = leakage_a(self.fixture_faults, site, part.index, self.seed)
        return part.defect != "open" and not contact_broken(self.fixture_faults, site, part.index)

    def _bin(self, site: int, hard_bin: int) -> None:
        part = self.in_sites[site - 1]
        if part is None:
            raise ScpiError(-221, f"site {site} is empty")
        if part.binned_hard_bin is not None:
            self.bins[part.binned_hard_bin] -= 1  # re-sorting before the next index
        part.binned_hard_bin = hard_bin
        self.bins[hard_bin] += 1

    def _reseat(self, site: int) -> None:
        part = self.in_sites[site - 1]
        if part is None:
            raise ScpiError(-221, f"site {site} is empty")
        with self.model.lock:
            was_contacted = self.model.contact[site - 1]
            self.model.seat(site, None, self.clock.now(), contact=False)
        self.clock.sleep(self.index_s / 2.0)
        contact = (was_contacted or (part.defect == "open" and part.reseat_fixes)) and \
            not contact_broken(self.fixture_faults, site, part.index)
        with self.model.lock:
            self.model.seat(site, part, self.clock.now(), contact=contact)


def _quoted(token: Token) -> str:
    if not isinstance(token, QuotedString) or not token.text.strip():
        raise ScpiError(-104, "a part id in quotes was expected")
    return token.text.strip()

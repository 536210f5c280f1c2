"""Running a lot: index after index until the handler reports the end, logging every part.

On every way out (end of lot, an error, Ctrl-C, SIGTERM) the bench is put in its safe state
and lot.json is rewritten with what was done, so the datalog always says how the lot ended.
"""

from __future__ import annotations

import time
from collections import Counter
from collections.abc import Callable
from dataclasses import dataclass, field

from drivers.errors import InstrumentError
from station import __version__
from station.datalog import DatalogWriter, PartRecord
from station.index_screen import IndexScreen, PartOutcome
from station.screen_plan import ScreenPlan
from station.site_readings import SiteReader

SOFTWARE_NAME = "ampscreen-station"


class LotInterrupted(Exception):
    """The operator (Ctrl-C) or the system (SIGTERM) stopped the lot."""


@dataclass(frozen=True)
class LotSettings:
    lot_id: str
    operator: str
    mode: str                       # "run" or "dry-run"


@dataclass
class LotTally:
    """Running counts, for the progress display and the end-of-lot summary."""

    parts: int = 0
    good: int = 0
    tester_faults: int = 0
    retests: int = 0
    hard_bins: Counter = field(default_factory=Counter)
    soft_bins: Counter = field(default_factory=Counter)
    grades: Counter = field(default_factory=Counter)
    started: float = field(default_factory=time.monotonic)
    stopped_because: str = ""       # empty: the lot ran to its end

    @property
    def yield_pct(self) -> float:
        judged = self.parts - self.tester_faults
        return 100.0 * self.good / judged if judged else 0.0

    @property
    def parts_per_hour(self) -> float:
        elapsed = time.monotonic() - self.started
        return 3600.0 * self.parts / elapsed if elapsed > 0 else 0.0


class LotRunner:
    def __init__(self, plan: ScreenPlan, bench, writer: DatalogWriter, settings: LotSettings,
                 on_part: Callable[[PartRecord, LotTally], None] | None = None,
                 sleep: Callable[[float], None] = time.sleep) -> None:
        self.plan = plan
        self.bench = bench
        self.writer = writer
        self.settings = settings
        self.on_part = on_part or (lambda record, tally: None)
        self.tally = LotTally()
        self.safe_state_log: list[str] = []
        config = plan.bench
        self.reader = SiteReader(dmms=bench.dmms, switch=bench.switch, loop_gain=config.loop_gain,
                                 dmm_per_site=config.dmm_per_site, dmm_range_v=plan.sequence.dmm_range_v,
                                 autozero=plan.sequence.autozero, sleep=sleep)
        self.screen = IndexScreen(bench, plan, self.reader, sleep=sleep)
        self._seen_ids: set[str] = set()

    def header(self) -> dict:
        plan, table = self.plan, self.plan.table
        return {
            "lot_id": self.settings.lot_id, "station": plan.bench.station, "operator": self.settings.operator,
            "mode": self.settings.mode, "product": table.product,
            "software": {"name": SOFTWARE_NAME, "version": __version__},
            "instruments": self.bench.identities(),
            "sites": plan.bench.sites, "head": 1, "span_v": plan.sequence.span_v,
            "rf_ohm": plan.bench.rf_ohm, "rs_ohm": plan.bench.rs_ohm,
            "tests": [{"test_num": t.test_num, "test_txt": t.test_txt, "param": t.param,
                       "region": t.region or "", "units": t.units} for t in plan.tests],
        }

    def run(self) -> LotTally:
        self.writer.start(self.header(), {"sequence": self.plan.sequence_path,
                                          "limits": self.plan.limits_path, "bench": self.plan.bench_path})
        try:
            self.screen.power_up()
            while True:
                ids = self.bench.handler.next_index()
                if ids is None:
                    break
                self._index(ids)
        except LotInterrupted as exc:
            self.tally.stopped_because = str(exc) or "interrupted"
        except KeyboardInterrupt:
            self.tally.stopped_because = "interrupted by Ctrl-C"
        except InstrumentError as exc:
            self.tally.stopped_because = f"instrument failure: {exc}"
        finally:
            self.safe_state_log = self.bench.safe_state()
            self.writer.finish(self._end_of_lot())
        return self.tally

    def _index(self, ids: list[str | None]) -> None:
        start = time.monotonic()
        outcomes = self.screen.screen(ids)
        for outcome in outcomes:
            self.bench.handler.assign_bin(outcome.site, outcome.verdict.hard_bin, outcome.verdict.reason)
        test_t_ms = round(1000.0 * (time.monotonic() - start))
        if any(o.verdict.passed is None for o in outcomes):
            self.screen.power_up()  # restore the bench conditions after a tester fault
        for outcome in outcomes:
            self._log(outcome, test_t_ms)

    def _log(self, outcome: PartOutcome, test_t_ms: int) -> None:
        verdict = outcome.verdict
        retest = outcome.part_id in self._seen_ids
        self._seen_ids.add(outcome.part_id)
        record = PartRecord(
            part_id=outcome.part_id, site=outcome.site, hard_bin=verdict.hard_bin, soft_bin=verdict.soft_bin,
            grade=verdict.grade if verdict.passed else None, passed=verdict.passed, test_t_ms=test_t_ms,
            retest=retest, fail_test=verdict.failing.result.test_num if verdict.failing else None,
            fault=outcome.fault, end_t=time.time())
        self.writer.write_part(record, outcome.rows)
        tally = self.tally
        tally.parts += 1
        tally.good += bool(verdict.passed)
        tally.tester_faults += verdict.passed is None
        tally.retests += retest
        tally.hard_bins[verdict.hard_bin] += 1
        tally.soft_bins[verdict.soft_bin] += 1
        if verdict.passed:
            tally.grades[verdict.grade] += 1
        self.on_part(record, tally)

    def _end_of_lot(self) -> dict:
        table, tally = self.plan.table, self.tally
        return {
            "complete": not tally.stopped_because,
            "stopped_because": tally.stopped_because,
            "parts_tested": tally.parts,
            "safe_state": self.safe_state_log,
            "hard_bins": {str(n): {"name": b.name, "pass": b.passing, "count": tally.hard_bins.get(n, 0)}
                          for n, b in sorted(table.hard_bins.items())},
            "soft_bins": {str(n): {"name": b.name, "pass": b.passing, "count": tally.soft_bins.get(n, 0)}
                          for n, b in sorted(table.soft_bins.items())},
        }

"""Screening one handler index: 1 to 4 parts, sharing the supply steps, read site by site.

For each index: the contact check (each site powered alone, Iq against the open/short
window, one re-seat and retest on failure), then the sequence's tests on the sites that made
contact, then grading and binning per site. An instrument failure anywhere in the index is a
tester fault: every part of the index goes to the tester-fault bin, never to a DUT fail bin
(the runner then retests them once the bench answers again). The error queue of every
instrument is read at the end of each index: an entry means a command may not have taken
effect, so the index's measurements are not trusted.
"""

from __future__ import annotations

import math
import time
from collections.abc import Callable
from dataclasses import dataclass, field

from drivers.errors import InstrumentError
from station.config.plan import ScreenPlan
from station.config.rail_points import rails_for
from station.config.sequence import TestStep
from station.config.test_catalog import TestDef
from station.datalog.writer import ResultRow
from station.judge.grading import (
    Result,
    Verdict,
    check_value,
    contact_state,
    contact_verdict,
    fails_loosest,
    grade_part,
    limit_for,
    tester_fault_verdict,
)
from station.judge.measure import Figure, aol_figures, cmrr_figures, psrr_figures
from station.lot.site_readings import SiteReader
from station.lot.sweep_order import visit_order

CONTACT_MIN_WAIT_S = 0.005  # supply current read-back settles within a few ms


@dataclass
class SiteWork:
    """What one site's part has gathered so far in this index."""

    site: int
    part_id: str
    raw: list[tuple[TestDef, float]] = field(default_factory=list)
    figures: list[tuple[TestDef, float]] = field(default_factory=list)
    contact: str = "ok"
    stopped: bool = False  # stop-on-fail: no grade can pass any more


@dataclass(frozen=True)
class PartOutcome:
    site: int
    part_id: str
    verdict: Verdict
    rows: list[ResultRow]
    fault: str = ""
    error: InstrumentError | None = None   # the instrument failure behind `fault`


class IndexScreen:
    def __init__(self, bench, plan: ScreenPlan, reader: SiteReader,
                 sleep: Callable[[float], None] = time.sleep) -> None:
        self.bench = bench
        self.plan = plan
        self.reader = reader
        self.sleep = sleep
        self._rails: tuple[float, float] | None = None
        self._force: float | None = None

    # --- bench conditions (skip commands that would change nothing) ---
    def set_rails(self, v_pos: float, v_neg: float) -> None:
        if self._rails != (v_pos, v_neg):
            self.bench.supply.set_rails(v_pos, v_neg)
            self._rails = (v_pos, v_neg)

    def set_force(self, level: float) -> None:
        if self._force != level:
            self.bench.force.set_level(level)
            self._force = level

    def power_up(self) -> None:
        """Outputs on at the nominal supply, force at zero (once per lot, and after a fault)."""
        seq = self.plan.sequence
        self.bench.supply.set_compliance(seq.compliance_a)
        self._rails = self._force = None
        self.set_rails(*rails_for(0.0, seq.span_v))
        self.set_force(0.0)
        self.bench.force.output(True)
        self.bench.supply.outputs(True)

    def forget_state(self) -> None:
        """After a fault the instruments may have lost our settings: set everything again."""
        self._rails = self._force = None
        self.reader._config = None

    # --- one index ---
    def screen(self, ids: list[str | None]) -> list[PartOutcome]:
        work = [SiteWork(site, pid) for site, pid in enumerate(ids, start=1) if pid]
        if not work:
            return []
        try:
            self._run_tests(work)
            self._check_error_queues()
        except InstrumentError as exc:
            self.forget_state()
            reason = str(exc)
            return [PartOutcome(w.site, w.part_id, tester_fault_verdict(self.plan.table, reason), [], reason,
                                exc) for w in work]
        finally:
            try:
                self.bench.switch.power_sites(set())  # parts are never handled powered
            except InstrumentError:
                pass
        return [self._grade(w) for w in work]

    def _check_error_queues(self) -> None:
        for link in self.bench.all_links().values():
            link.check_errors()

    def _run_tests(self, work: list[SiteWork]) -> None:
        seq = self.plan.sequence
        self.set_rails(*rails_for(0.0, seq.span_v))
        self.set_force(0.0)
        for step in seq.tests:
            live = [w for w in work if w.contact == "ok" and not w.stopped]
            if not live and step.kind != "contact":
                break
            raw_defs, figure_defs = self.plan.step_tests(step)
            if step.kind == "contact":
                self._contact(step, work, figure_defs[0])
                self.bench.switch.power_sites({w.site for w in work if w.contact == "ok"})
                continue
            if step.kind == "supply_current":
                self._supply_current(step, live, figure_defs[0])
                continue
            values = self._sweep(step, live)
            for w in live:
                readings = values[w.site]
                if raw_defs:  # the offset test logs its one reading as the figure itself
                    w.raw.extend(zip(raw_defs, readings, strict=True))
                w.figures.extend(_figures_to_rows(self._compute(step, readings), figure_defs))
                if step.stop_on_fail and self._any_hopeless(w, figure_defs):
                    w.stopped = True

    def _sweep(self, step: TestStep, live: list[SiteWork]) -> dict[int, list[float]]:
        """Step through the step's conditions; per site, the offset at each condition."""
        seq = self.plan.sequence
        sites = [w.site for w in live]
        per_site: dict[int, list[float]] = {s: [] for s in sites}
        if step.kind == "offset":
            conditions = [(rails_for(0.0, seq.span_v), 0.0)]
        elif step.kind == "cm_sweep":
            conditions = [(rails_for(vcm, seq.span_v), 0.0) for vcm in step.point_vcms(seq.span_v)]
        elif step.kind == "gain":
            conditions = [(rails_for(0.0, seq.span_v), level) for level in step.levels_v]
        elif step.kind == "supply_rejection":
            conditions = [(rails_for(0.0, span), 0.0) for span in step.spans_v]
        else:
            raise ValueError(f"no sweep for test kind {step.kind!r}")
        # Visit the conditions in monotonic order, from the end nearer to the bench's state, so
        # that each source step is small (the thermal tail of the settling grows with the
        # step), but log them in written order.
        here = (self._rails, self._force) if self._rails is not None and self._force is not None else None
        order = visit_order(conditions, here)
        values: dict[int, dict[int, float]] = {s: {} for s in sites}
        for i in order:
            rails, force = conditions[i]
            self.set_rails(*rails)
            self.set_force(force)
            for site, value in self.reader.read(sites, step).items():
                values[site][i] = value
        self.set_force(0.0)
        for site in sites:
            per_site[site] = [values[site][i] for i in range(len(conditions))]
        return per_site

    def _compute(self, step: TestStep, readings: list[float]) -> list[Figure]:
        seq = self.plan.sequence
        if step.kind == "offset":
            return [Figure("vos", None, readings[0], "V")]
        if step.kind == "cm_sweep":
            return cmrr_figures(list(step.point_vcms(seq.span_v)), readings, self.plan.bounds,
                                self.plan.table.region_kinds())
        if step.kind == "gain":
            return aol_figures(list(step.levels_v), readings)
        return psrr_figures(list(step.spans_v), readings)

    def _measure_iq(self, site: int, wait_s: float) -> float:
        self.bench.switch.power_sites({site})
        self.sleep(wait_s)
        return self.bench.supply.measure_current("V+")

    def _contact(self, step: TestStep, work: list[SiteWork], test: TestDef) -> None:
        wait = _current_wait(step)
        for w in work:
            iq = self._measure_iq(w.site, wait)
            w.contact = contact_state(iq, self.plan.table)
            for _ in range(step.retest):
                if w.contact == "ok":
                    break
                self.bench.switch.power_sites(set())
                self.bench.handler.reseat(w.site)
                iq = self._measure_iq(w.site, wait)
                w.contact = contact_state(iq, self.plan.table)
            w.figures.append((test, iq))

    def _supply_current(self, step: TestStep, live: list[SiteWork], test: TestDef) -> None:
        self.set_rails(*rails_for(0.0, self.plan.sequence.span_v))
        wait = _current_wait(step)
        for w in live:
            w.figures.append((test, self._measure_iq(w.site, wait)))
        self.bench.switch.power_sites({w.site for w in live})

    def _any_hopeless(self, w: SiteWork, figure_defs: list[TestDef]) -> bool:
        nums = {t.test_num for t in figure_defs}
        return any(fails_loosest(_result(t, v), self.plan.table) for t, v in w.figures if t.test_num in nums)

    # --- grading and rows ---
    def _grade(self, w: SiteWork) -> PartOutcome:
        table = self.plan.table
        if w.contact != "ok":
            verdict = contact_verdict(w.contact, table)
        else:
            verdict = grade_part([_result(t, v) for t, v in w.figures if t.param != "contact_iq"], table)
        grade = table.grade(verdict.decided_by) if verdict.decided_by else None
        rows = [ResultRow(t, v) for t, v in w.raw]
        for t, v in w.figures:
            limit = limit_for(grade, t.param, t.region) if grade else None
            passed = check_value(v, limit) if limit else None
            rows.append(ResultRow(t, v, limit.low if limit else None, limit.high if limit else None, passed,
                                  verdict.decided_by))
        rows.sort(key=lambda r: self.plan.order_of(r.test.test_num))
        return PartOutcome(w.site, w.part_id, verdict, rows)


def _result(test: TestDef, value: float) -> Result:
    return Result(test.param, test.region, value, test.test_num)


def _figures_to_rows(figures: list[Figure], defs: list[TestDef]) -> list[tuple[TestDef, float]]:
    by_key = {(f.param, f.region): f.value for f in figures}
    rows = []
    for test in defs:
        value = by_key.get((test.param, test.region), math.nan)
        rows.append((test, value))
    return rows


def _current_wait(step: TestStep) -> float:
    settle = step.settle
    return settle.wait_s if not settle.adaptive and settle.wait_s else max(settle.min_s, CONTACT_MIN_WAIT_S)

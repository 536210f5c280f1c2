"""Screening one handler index: 1 to 4 parts, sharing the supply steps, read site by site.

For each index: the sequence's steps in order, each run by its kind (station/kinds): the
contact check first (each site powered alone, Iq against the open/short window, a re-seat and
retest on failure), then the measurements on the sites that made contact; then grading and
binning per site. An instrument failure anywhere in the index is a tester fault: every part
of the index goes to the tester-fault bin, never to a DUT fail bin (the runner then retests
them once the bench answers again). The error queue of every instrument is read at the end of
each index: an entry means a command may not have taken effect, so the index's measurements
are not trusted.
"""

from __future__ import annotations

import time
from collections.abc import Callable
from dataclasses import dataclass

from drivers.errors import InstrumentError
from drivers.generator import FunctionGenerator
from drivers.scpi_link import check_errors_together
from station.config.bench_config import BenchConfig
from station.config.limit_tables import LimitTable
from station.config.plan import ScreenPlan
from station.config.rail_points import rails_for
from station.config.sequence import TestStep
from station.config.test_catalog import TestDef
from station.datalog.writer import ResultRow
from station.judge.grading import (
    Result,
    Verdict,
    contact_verdict,
    fails_loosest,
    grade_part,
    tester_fault_verdict,
)
from station.kinds.base import KindContext, SiteWork
from station.kinds.registry import kind_of
from station.lot.bench import Bench
from station.lot.site_readings import SiteReader
from station.lot.sweep_order import Condition, visit_order

__all__ = ["IndexScreen", "PartOutcome", "SiteWork"]


@dataclass(frozen=True)
class PartOutcome:
    site: int
    part_id: str
    verdict: Verdict
    rows: list[ResultRow]
    fault: str = ""
    error: InstrumentError | None = None   # the instrument failure behind `fault`


class IndexScreen:
    """One index at a time on `bench`; also the `StepScreen` the kinds run their steps on."""

    def __init__(self, bench: Bench, plan: ScreenPlan, reader: SiteReader,
                 sleep: Callable[[float], None] = time.sleep) -> None:
        self.bench = bench
        self.plan = plan
        self.reader = reader
        self.sleep = sleep
        self._rails: tuple[float, float] | None = None
        self._force: float | None = None
        self._outputs_on = False
        self._read_back = False        # the next rail setting is read back (after a recovery)
        self._bias: set[int] = set()   # bias relays closed (Rb in series); None of them at rest
        self._bias_unsure = False      # after a fault: the bias relays may be in any state
        self._bias_moved_at = 0.0      # reader clock when the bias relays last moved (acknowledged)
        self._diff_sites: set[int] = set()  # sites switched to the difference amplifier
        self._diff_unsure = False      # after a fault: the switch-over relays may be in any state
        self._generator_on = False     # the generator's output (off at rest; forced off after a fault)

    # --- what a kind sees (StepScreen) ---
    @property
    def context(self) -> KindContext:
        return self.plan.context

    @property
    def table(self) -> LimitTable:
        return self.plan.table

    # --- bench conditions (skip commands that would change nothing) ---
    def set_rails(self, v_pos: float, v_neg: float) -> None:
        if self._rails != (v_pos, v_neg):
            self.bench.supply.set_rails(v_pos, v_neg)
            self._rails = (v_pos, v_neg)
            if self._read_back:        # first setting after a recovery: trust nothing cached
                self.bench.supply.verify_state(v_pos, v_neg, on=self._outputs_on)
                self._read_back = False

    def set_force(self, level: float) -> None:
        if self._force != level:
            self.bench.force.set_level(level)
            self._force = level

    def set_sine(self, frequency_hz: float, amplitude_vrms: float) -> None:
        self._generator().set_sine(frequency_hz, amplitude_vrms)

    def generator_output(self, on: bool) -> None:
        if on != self._generator_on:
            self._generator_on = on     # before the command: a failed OFF is retried on the way out
            self._generator().output(on)

    def _generator(self) -> FunctionGenerator:
        if self.bench.generator is None:
            raise ValueError("the bench has no function generator; the plan should have refused this")
        return self.bench.generator

    def read_ac(self, sites: list[int], range_v: float, frequency_hz: float, aperture_s: float,
                samples: int) -> dict[int, float]:
        return self.reader.read_ac(sites, range_v, frequency_hz, aperture_s, samples)

    def power_sites(self, sites: set[int]) -> None:
        self.bench.switch.power_sites(sites)

    def reseat(self, site: int) -> None:
        self.bench.handler.reseat(site)

    def set_bias(self, sites: list[int], plus: bool, minus: bool) -> None:
        bias = self.bench.config.bias
        if bias is None:
            raise ValueError("the bench config has no fixture.bias; the plan should have refused this")
        wanted = set().union(*(bias.channels(site, plus, minus) for site in sites)) if sites else set()
        if wanted != self._bias or self._bias_unsure:
            self.bench.switch.set_bias(wanted)
            self._bias, self._bias_unsure = wanted, False
            self._bias_moved_at = self.reader.clock()

    def bias_rb(self, site: int) -> float:
        bias = self.bench.config.bias
        if bias is None:
            raise ValueError("the bench config has no fixture.bias")
        return bias.rb_ohm[site - 1]

    def read_offsets(self, step: TestStep, sites: list[int]) -> dict[int, float]:
        return self.reader.read(sites, step)

    def read_after_relay(self, step: TestStep, sites: list[int], before: dict[int, float],
                         rb_in: dict[int, float]) -> dict[int, float]:
        return self.reader.read_after_relay(sites, step, before, rb_in, self._bias_moved_at)

    @property
    def bench_config(self) -> BenchConfig:
        return self.bench.config

    def use_fixture(self, sites: list[int], fixture: str) -> None:
        config = self.bench.config
        if not config.switch_over_channels:
            return
        wanted = set(sites) if fixture == "diff_amp" else set()
        if wanted != self._diff_sites or self._diff_unsure:
            self.bench.switch.switch_to_diff_amp(wanted)
            self._diff_sites, self._diff_unsure = wanted, False

    def measure_iq(self, site: int, wait_s: float) -> float:
        self.bench.switch.power_sites({site})
        self.sleep(wait_s)
        return self.bench.supply.measure_current("V+")

    def power_up(self) -> None:
        """Outputs on at the nominal supply, force at zero (once per lot, and after a fault)."""
        seq = self.plan.sequence
        self.bench.supply.set_compliance(seq.compliance_a)
        self._rails = self._force = None
        self.set_rails(*rails_for(0.0, seq.span_v))
        self.set_force(0.0)
        self.bench.force.output(True)
        self.bench.supply.outputs(True)
        self._outputs_on = True
        # The bench as it really is, before the first part (at lot start and after a recovery).
        self.bench.supply.verify_state(*rails_for(0.0, seq.span_v), on=True)
        self._read_back = False

    def forget_state(self) -> None:
        """After a fault the instruments may have lost our settings: set everything again."""
        self._rails = self._force = None
        self._read_back = True
        self._bias_unsure = self.bench.config.bias is not None
        self._diff_unsure = bool(self.bench.config.switch_over_channels)
        self._generator_on = self.bench.generator is not None   # unsure: switched off on the way out
        self.reader.forget_config()

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
                if self._generator_on and self.bench.generator is not None:   # no sine between parts
                    self.bench.generator.output(False)
                    self._generator_on = False
                self.bench.switch.power_sites(set())  # parts are never handled powered
                if self._bias or self._bias_unsure:   # the next index starts with Rb shunted
                    self.set_bias([], False, False)
                if self._diff_sites or self._diff_unsure:
                    self.use_fixture([], "servo_loop")     # ... and every site in the servo loop
            except InstrumentError:
                pass
        return [self._grade(w) for w in work]

    def _check_error_queues(self) -> None:
        check_errors_together(list(self.bench.all_links().values()))

    def _run_tests(self, work: list[SiteWork]) -> None:
        seq = self.plan.sequence
        self.set_rails(*rails_for(0.0, seq.span_v))
        self.set_force(0.0)
        if self._bias_unsure:   # no reading is taken with an Rb left in series after a fault
            self.set_bias([], False, False)
        if self._diff_unsure:   # ... nor with a site left on the wrong fixture
            self.use_fixture([], "servo_loop")
        for step in seq.tests:
            kind = kind_of(step)
            parts = work if kind.checks_contact else [w for w in work if w.live]
            if not parts:
                break
            tests = self.plan.step_tests(step)
            kind.run(step, tests, self, parts)
            if step.stop_on_fail and not kind.checks_contact:
                numbers = {t.test_num for t in tests.figures}
                for w in parts:
                    w.stopped = w.stopped or self._any_hopeless(w, numbers)

    def sweep(self, step: TestStep, sites: list[int], conditions: list[Condition]) -> dict[int, list[float]]:
        """Step through `conditions`; per site, the offset at each condition, in the order given."""
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
        return {site: [values[site][i] for i in range(len(conditions))] for site in sites}

    def _any_hopeless(self, w: SiteWork, numbers: set[int]) -> bool:
        return any(fails_loosest(_result(t, v), self.plan.table) for t, v in w.figures if t.test_num in numbers)

    # --- grading and rows ---
    def _grade(self, w: SiteWork) -> PartOutcome:
        table = self.plan.table
        if w.contact != "ok":
            verdict = contact_verdict(w.contact, table)
        else:
            verdict = grade_part([_result(t, v) for t, v in w.figures if t.param != "contact_iq"], table)
        # The limits and pass/fail of each row are the checks grading made, not a second check.
        checks = {c.result.test_num: c for c in verdict.checks}
        rows = [ResultRow(t, v) for t, v in w.raw]
        for t, v in w.figures:
            check = checks.get(t.test_num)
            limit = check.limit if check is not None else None
            rows.append(ResultRow(t, v, limit.low if limit else None, limit.high if limit else None,
                                  check.passed if check is not None else None, verdict.decided_by))
        rows.sort(key=lambda r: self.plan.order_of(r.test.test_num))
        return PartOutcome(w.site, w.part_id, verdict, rows)


def _result(test: TestDef, value: float) -> Result:
    return Result(test.param, test.region, value, test.test_num)

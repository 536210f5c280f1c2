"""Running a lot: index after index until the handler reports the end, logging every part.

On every way out (end of lot, an instrument that stays broken, Ctrl-C, SIGTERM, a bug) the
bench is put in its safe state, with Ctrl-C and SIGTERM held off until it is done, and
lot.json is rewritten with what was done, so the datalog always says how the lot ended.

Tester faults: the parts of an index that ended in an instrument failure are logged to the
tester-fault bin, are NOT sorted, and are tested again in place (they are still seated) once
the bench answers again; those rows carry RETEST=1. After `max_faults` faulted attempts in a
row (an index, or a handler transaction) the lot stops, naming the instrument and command.
"""

from __future__ import annotations

import gc
import time
from collections import Counter
from collections.abc import Callable
from dataclasses import dataclass, field
from functools import partial

from drivers.errors import InstrumentError
from station import __version__
from station.config.plan import ScreenPlan
from station.datalog.resume import ResumeState, part_fields
from station.datalog.writer import DatalogWriter, PartRecord
from station.errors import EXIT_SOFTWARE, EXIT_STOPPED, Stopped  # exit codes of a stop
from station.judge.grading import Verdict, tester_fault_verdict
from station.lot.bench import Bench
from station.lot.index_screen import IndexScreen, PartOutcome
from station.lot.site_readings import SiteReader
from station.lot.stop_signals import LotInterrupted, signals_deferred, signals_held
from station.screen.dynamic_pat import LotPat
from station.screen.lot_guard import Decide, LotGuard, no_operator

__all__ = ["LotInterrupted", "LotRunner", "LotSettings", "LotStopped", "LotTally"]

SOFTWARE_NAME = "ampscreen-station"


def scaled_sleep(speed: float) -> Callable[[float], None]:
    """The station's waits on a simulated bench running `speed` times faster than real time.

    The station's clock stays wall time, so its hard bound on settling stays in wall time,
    where its own overhead is; the physics it waits for runs in model time."""
    if speed == 1:
        return time.sleep
    return lambda seconds: time.sleep(seconds / speed)


class LotStopped(Stopped):
    """The bench stayed faulty for `max_faults` attempts in a row."""


@dataclass(frozen=True)
class LotSettings:
    lot_id: str
    operator: str
    mode: str                       # "run" or "dry-run"
    max_faults: int = 3             # faulted attempts in a row before the lot stops
    fault_pause_s: float = 0.5      # wait before recovering, times the attempt number
    extra_header: dict = field(default_factory=dict)   # e.g. the dry run's simulated lot
    pat_preset: tuple[list, str] | None = None   # dynamic PAT limits from a previous lot, and whence

    @property
    def is_study(self) -> bool:
        """A repeatability study (lot.json `study`): the same parts come again and are tested
        every time, instead of being sorted to the bin they got before."""
        return "study" in self.extra_header


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
    stop_code: int = 0              # exit code of the stop (EXIT_STOPPED or EXIT_SOFTWARE)
    faulted_attempts: int = 0       # index attempts or handler transactions that failed
    session_parts: int = 0          # rows of this session (not of the resumed ones)

    def add(self, hard_bin: int, soft_bin: int, passed: bool | None, grade: str | None, retest: bool) -> None:
        self.parts += 1
        self.good += bool(passed)
        self.tester_faults += passed is None
        self.retests += retest
        self.hard_bins[hard_bin] += 1
        self.soft_bins[soft_bin] += 1
        if passed and grade:
            self.grades[grade] += 1

    @property
    def yield_pct(self) -> float:
        judged = self.parts - self.tester_faults
        return 100.0 * self.good / judged if judged else 0.0

    @property
    def parts_per_hour(self) -> float:
        elapsed = time.monotonic() - self.started
        return 3600.0 * self.session_parts / elapsed if elapsed > 0 else 0.0


class LotRunner:
    def __init__(self, plan: ScreenPlan, bench: Bench, writer: DatalogWriter, settings: LotSettings,
                 on_part: Callable[[PartRecord, LotTally], None] | None = None,
                 sleep: Callable[[float], None] = time.sleep, resume: ResumeState | None = None,
                 tell: Callable[[str], None] = lambda text: None,
                 way_out: Callable[[], None] = lambda: None,
                 decide: Decide = no_operator) -> None:
        self.plan = plan
        self.way_out = way_out     # told first thing on the way out: later signals stop nothing
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
        self.sleep = sleep
        self.tell = tell
        self.resume = resume
        self._seen_ids: set[str] = set()       # every id with a row: a later test is a retest
        self._final_bins: dict[str, int] = {}  # finished parts -> the hard bin they were sorted to
        self._consecutive_faults = 0
        self._earlier_retries: dict[str, int] = {}
        self._verdicts: dict[str, Verdict] = {}     # after PAT, for sorting
        # Lot control (station/screen): alarms on a bench problem, acted on between indexes.
        self.guard = LotGuard(plan.sequence.lot_control, plan.bench.sites, write=self._write_header_fields,
                              tell=tell, decide=decide, make_safe=self._make_safe,
                              power_up=lambda: self._tolerant(self.screen.power_up),
                              earlier=list(resume.header.get("alarms", [])) if resume is not None else None,
                              earlier_decisions=list(resume.header.get("operator_decisions", []))
                              if resume is not None else None)
        preset = settings.pat_preset
        self.pat = LotPat(plan.table, preset[0] if preset else None, preset[1] if preset else "")
        if resume is not None:
            self._take_over(resume)

    def _take_over(self, resume: ResumeState) -> None:
        """Counts and ids of the parts logged before the lot was interrupted."""
        for row in resume.part_rows:
            pid, hard, soft, grade, passed, retest = part_fields(row)
            self.tally.add(hard, soft, None if passed == "" else passed == "1", grade or None, retest == "1")
            if pid in resume.done_ids:
                self._final_bins[pid] = hard
        self._seen_ids = resume.seen_ids
        self.tally.faulted_attempts = int(resume.header.get("faulted_attempts", 0))
        self._earlier_retries = dict(resume.header.get("instrument_retries", {}))
        from station.screen.pat_outcome import earlier_pat, results_by_part

        earlier = earlier_pat(resume.header)
        ids = {str(p) for p in (earlier.get("dynamic") or {}).get("baseline_parts", [])}
        self.pat.restore(earlier, results_by_part(resume.result_rows, ids))

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
            **self.settings.extra_header,
            "alarms": [], "paused": False,
            **({"pat": self.pat.lot_json()} if self.pat.active else {}),
        }

    def run(self) -> LotTally:
        # A full garbage collection over the set-up's heap (pint, pandas, pydantic) holds the
        # interpreter lock for 20-100 ms and stalls the DMM reading threads mid-condition;
        # freezing that heap leaves the collector only the lot's own objects.
        gc.collect()
        gc.freeze()
        started = False
        try:
            copies = {"sequence": self.plan.sequence_path, "limits": self.plan.limits_path,
                      "bench": self.plan.bench_path}
            if self.plan.applications_path is not None:
                copies["applications"] = self.plan.applications_path
            self.writer.start(self.header(), copies)
            started = True
            self._tolerant(self.screen.power_up)
            while True:
                ids = self._tolerant(self.bench.handler.next_index)
                if ids is None:
                    break
                self._index(ids)
                why = self.guard.after_index()
                if why is not None:
                    raise LotStopped(why)
        except LotInterrupted as exc:
            self._stop(str(exc) or "interrupted", EXIT_STOPPED)
        except KeyboardInterrupt:
            self._stop("interrupted by Ctrl-C", EXIT_STOPPED)
        except LotStopped as exc:
            self._stop(str(exc), EXIT_STOPPED)
        except InstrumentError as exc:
            self._stop(f"instrument failure: {exc}", EXIT_STOPPED)
        except Exception as exc:  # a bug or a full disk must still reach the safe state
            # Ends like any other stop: safe state, datalog consistent, parts under test
            # resumable (exit 3); the message names the error for the bug report.
            self._stop(f"station error: {type(exc).__name__}: {exc}", EXIT_STOPPED)
        finally:
            self.way_out()
            with signals_deferred(self.tell):
                self.safe_state_log = self.bench.safe_state()
                if started:
                    self._finish_datalog()
        return self.tally

    def _stop(self, why: str, code: int) -> None:
        self.tally.stopped_because = why
        self.tally.stop_code = code

    def _write_header_fields(self, fields: dict) -> None:
        self.writer.header.update(fields)
        self.writer.write_header()

    def _make_safe(self) -> list[str]:
        # power_up afterwards sets every level again (its own cache reset), outputs last.
        return self.bench.safe_state()

    def _finish_datalog(self) -> None:
        try:
            self.writer.finish(self._end_of_lot())
        except Exception as exc:  # the parts are on disk already; say that lot.json is not
            why = f"lot.json not rewritten: {type(exc).__name__}: {exc}"
            self._stop(f"{self.tally.stopped_because}; {why}" if self.tally.stopped_because else why, EXIT_SOFTWARE)

    # --- faults ----------------------------------------------------------------------
    def _tolerant(self, action: Callable[[], object]):
        """Run a bench action; an instrument failure counts as a faulted attempt and the
        action is tried again after recovery, until `max_faults` in a row stop the lot."""
        while True:
            try:
                return action()
            except InstrumentError as exc:
                self._fault(exc)

    def _fault(self, exc: InstrumentError) -> None:
        """One faulted attempt: stop at the budget, else wait, recover and return. Recovery
        itself may meet the fault again; it is tried up to `max_faults` times."""
        self._consecutive_faults += 1
        self.tally.faulted_attempts += 1
        limit = self.settings.max_faults
        if self._consecutive_faults >= limit:
            raise LotStopped(_stop_text(f"{self._consecutive_faults} faulted attempts in a row "
                                        f"(--max-faults {limit})", exc))
        self.tell(f"tester fault: {exc}; recovering and retesting")
        for attempt in range(1, limit + 1):
            self.sleep(self.settings.fault_pause_s * attempt)
            try:
                self._recover(exc.role)
                return
            except InstrumentError as again:
                exc = again
        raise LotStopped(_stop_text(f"the bench did not recover after a tester fault ({limit} tries, "
                                    f"--max-faults {limit})", exc))

    def _recover(self, role: str) -> None:
        """The failed instrument answering again (its link reconnects on the way), the stale
        errors of the failed attempt cleared, and the bench conditions set again."""
        self.screen.forget_state()
        link = self.bench.all_links().get(role)
        if link is not None:
            link.write_and_wait("*CLS")
        self.screen.power_up()

    # --- one index -------------------------------------------------------------------
    def _index(self, ids: list[str | None]) -> None:
        # A part already finished in an earlier session (a resumed lot) is not tested again:
        # it is sorted to the bin it got then.
        done = {} if self.settings.is_study else self._final_bins
        again = {site: pid for site, pid in enumerate(ids, start=1) if pid in done}
        skipped = {site: pid for site, pid in enumerate(ids, start=1)
                   if pid and pid not in done and site in self.guard.skipped}
        todo = [None if pid in done or site in skipped else pid for site, pid in enumerate(ids, start=1)]
        pending = list(todo)
        finished: list[tuple[PartOutcome, int]] = []
        self._mark(todo)
        while any(pending):
            start = time.monotonic()
            outcomes = self.screen.screen(pending)
            test_t_ms = round(1000.0 * (time.monotonic() - start))
            faulted = [o for o in outcomes if o.error is not None]
            finished += [(o, test_t_ms) for o in outcomes if o.error is None]
            if not faulted:
                break
            for outcome in faulted:  # the record of the failed attempt; the parts stay seated
                self._log(outcome, test_t_ms)
            self._mark(todo)         # a resume keeps these rows
            error = faulted[0].error
            assert error is not None  # faulted outcomes carry their error
            self._fault(error)
            sites = {o.site for o in faulted}
            pending = [pid if site in sites else None for site, pid in enumerate(todo, start=1)]
        self._consecutive_faults = 0
        judged, pat_ready = [], False
        for found, test_t_ms in sorted(finished, key=lambda item: item[0].site):
            outcome, ready = self._pat(found)
            judged.append((outcome, test_t_ms))
            pat_ready = pat_ready or ready
        self._log_all(judged)   # the index's parts committed together, before any is sorted
        for outcome, _ in judged:
            self._final_bins[outcome.part_id] = outcome.verdict.hard_bin
        if pat_ready:           # lot.json names the baseline parts once their rows are durable
            self.tell(f"dynamic PAT: limits set from the first {len(self.pat.baseline)} passing parts")
            self._write_header_fields({"pat": self.pat.lot_json()})
        self.writer.clear_in_progress()
        for outcome, _ in finished:
            verdict = self._verdicts.pop(outcome.part_id, outcome.verdict)
            self._tolerant(partial(self.bench.handler.assign_bin, outcome.site, verdict.hard_bin, verdict.reason))
        for site, pid in skipped.items():   # untested: to the retest bin
            verdict = tester_fault_verdict(self.plan.table, f"site {site} skipped by the operator (lot control)")
            self._log(PartOutcome(site, pid, verdict, [], verdict.reason), 0)
            self._final_bins[pid] = verdict.hard_bin
            self._tolerant(partial(self.bench.handler.assign_bin, site, verdict.hard_bin, verdict.reason))
        for site, pid in again.items():
            self.tell(f"site {site}: {pid} was tested before this lot was resumed; sorted to bin "
                      f"{self._final_bins[pid]} as logged")
            self._tolerant(partial(self.bench.handler.assign_bin, site, self._final_bins[pid], "as logged"))

    def _pat(self, outcome: PartOutcome) -> tuple[PartOutcome, bool]:
        """The part after PAT (station/screen), and whether the dynamic limits were set by it."""
        from station.screen.pat_outcome import pat_outcome

        after, ready = pat_outcome(self.pat, outcome)
        self._verdicts[outcome.part_id] = after.verdict
        return after, ready

    def _mark(self, todo: list[str | None]) -> None:
        self.writer.mark_in_progress([pid for pid in todo if pid], presented_before=len(self._final_bins))

    def _log(self, outcome: PartOutcome, test_t_ms: int) -> None:
        self._log_all([(outcome, test_t_ms)])

    def _log_all(self, outcomes: list[tuple[PartOutcome, int]]) -> None:
        """Commit these parts' rows (one datalog commit, station/datalog/writer.write_parts),
        then count them and tell the lot control and the live page."""
        records = []
        for outcome, test_t_ms in outcomes:
            verdict = outcome.verdict
            retest = outcome.part_id in self._seen_ids
            self._seen_ids.add(outcome.part_id)
            records.append(PartRecord(
                part_id=outcome.part_id, site=outcome.site, hard_bin=verdict.hard_bin, soft_bin=verdict.soft_bin,
                grade=verdict.grade if verdict.passed else None, passed=verdict.passed, test_t_ms=test_t_ms,
                retest=retest, fail_test=verdict.failing.result.test_num if verdict.failing else None,
                fault=outcome.fault, end_t=time.time()))
        with signals_held():        # a stop never falls between a part's results and its row
            self.writer.write_parts([(record, outcome.rows) for record, (outcome, _) in
                                     zip(records, outcomes, strict=True)])
        for record, (outcome, _) in zip(records, outcomes, strict=True):
            verdict = outcome.verdict
            self.tally.add(verdict.hard_bin, verdict.soft_bin, verdict.passed, verdict.grade, record.retest)
            self.tally.session_parts += 1
            self.guard.observe(record.part_id, record.site, record.passed, record.soft_bin)
            self.on_part(record, self.tally)

    def _end_of_lot(self) -> dict:
        table, tally = self.plan.table, self.tally
        return {
            "complete": not tally.stopped_because,
            "stopped_because": tally.stopped_because,
            "parts_tested": tally.parts,
            "retests": tally.retests,
            "tester_fault_rows": tally.tester_faults,
            "faulted_attempts": tally.faulted_attempts,
            "instrument_retries": {role: link.retries + int(self._earlier_retries.get(role, 0))
                                   for role, link in self.bench.all_links().items()},
            "safe_state": self.safe_state_log,
            # What the safe state could not confirm by read-back (empty: the bench is safe).
            "safe_state_unverified": list(self.bench.unverified or []),
            "hard_bins": {str(n): {"name": b.name, "pass": b.passing, "count": tally.hard_bins.get(n, 0)}
                          for n, b in sorted(table.hard_bins.items())},
            "soft_bins": {str(n): {"name": b.name, "pass": b.passing, "count": tally.soft_bins.get(n, 0)}
                          for n, b in sorted(table.soft_bins.items())},
            **self.guard.fields(),
            **({"pat": self.pat.lot_json(final=True)} if self.pat.active else {}),
        }


def _stop_text(why: str, exc: InstrumentError) -> str:
    """Why the lot stops, naming the instrument and the last command."""
    return f"{why}; last: {exc.role} ({exc.resource}), command {exc.command!r}: {exc.detail}"

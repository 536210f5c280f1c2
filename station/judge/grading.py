"""Grading and binning of one part: its results against a limit table, best grade first.

Pure functions over plain records. The rules (docs/methods.md, "Grading and bins"):
- a part takes the first grade (best first) all of whose limits pass;
- a part that takes no grade fails to the soft bin of its first failing result, in execution
  order, under the loosest grade, and to the table's fail hard bin;
- contact failures (open/short) and tester faults have bins of their own; a tester fault is
  never a DUT failure (passed is None).

Missing results: a grade with a limit whose (parameter, region) has no result cannot be taken.
Results go missing only when the sequence stopped early on a fail, so the loosest grade then
has a failing result to bin by. If it has none (the part was never fully measured and nothing
failed), the part cannot be graded at all and gets a tester-fault verdict: we do not know.
"""

from __future__ import annotations

import math
from collections.abc import Sequence
from dataclasses import dataclass

from station.config.limit_tables import Grade, Limit, LimitTable


@dataclass(frozen=True)
class Result:
    """One figure of a part; the order of a list of Results is the execution order."""

    param: str
    region: str | None
    value: float
    test_num: int


@dataclass(frozen=True)
class Check:
    result: Result
    limit: Limit | None
    passed: bool | None  # None: no limit applies to this result


@dataclass(frozen=True)
class Verdict:
    grade: str | None  # grade taken by a passing part, else None
    hard_bin: int
    soft_bin: int
    passed: bool | None  # None: tester fault, no pass/fail indication
    decided_by: str | None  # grade whose limits the checks carry (the part's, or the loosest)
    checks: tuple[Check, ...]
    failing: Check | None  # first failing check under the loosest grade
    reason: str


def check_value(value: float, limit: Limit) -> bool:
    """low <= value <= high. Over-range (+-inf) fails a limit on its side; nan fails any limit."""
    if math.isnan(value):
        return False
    if limit.low is not None and not value >= limit.low:
        return False
    return limit.high is None or value <= limit.high


def limit_for(grade: Grade, param: str, region: str | None) -> Limit | None:
    for limit in grade.limits:
        if limit.param == param and limit.region == region:
            return limit
    return None


def checks_under(results: Sequence[Result], grade: Grade) -> tuple[Check, ...]:
    """Every result checked against `grade`, in execution order."""
    checks = []
    for result in results:
        limit = limit_for(grade, result.param, result.region)
        passed = None if limit is None else check_value(result.value, limit)
        checks.append(Check(result, limit, passed))
    return tuple(checks)


def takes_grade(results: Sequence[Result], grade: Grade) -> bool:
    """Every limit of `grade` has at least one result, and every such result passes."""
    measured = {(r.param, r.region) for r in results}
    if any((lim.param, lim.region) not in measured for lim in grade.limits):
        return False
    return all(c.passed is not False for c in checks_under(results, grade))


def grade_part(results: Sequence[Result], table: LimitTable) -> Verdict:
    for grade in table.grades:
        if takes_grade(results, grade):
            return Verdict(grade.name, grade.hard_bin, grade.soft_bin, True, grade.name,
                           checks_under(results, grade), None, f"grade {grade.name}")
    loosest = table.loosest
    checks = checks_under(results, loosest)
    failing = next((c for c in checks if c.passed is False), None)
    if failing is None:
        missing = _missing(results, loosest)
        return tester_fault_verdict(table, f"incomplete measurement, no result for {missing}")
    assert failing.limit is not None  # a failed check always has a limit
    return Verdict(None, table.fail_hard_bin, failing.limit.soft_bin, False, loosest.name,
                   checks, failing, f"fail: {failing.limit.bin_name} (soft bin {failing.limit.soft_bin})")


def fails_loosest(result: Result, table: LimitTable) -> bool:
    """For stop-on-fail: True when this result alone rules out every grade.

    A grade with no limit on the result's (parameter, region) could still pass, so this asks
    every grade, not only the loosest (the same answer for a table whose grades tighten).
    """
    for grade in table.grades:
        limit = limit_for(grade, result.param, result.region)
        if limit is None or check_value(result.value, limit):
            return False
    return True


def contact_state(iq_a: float, table: LimitTable) -> str:
    """"ok", "open" (supply current below the open threshold) or "short" (above the short one).

    An over-range current (+inf) is a short. A nan is no reading at all: ValueError, which the
    caller treats as a tester fault.
    """
    if math.isnan(iq_a):
        raise ValueError("supply current reading is nan: not a contact result")
    if iq_a < table.contact.open_below_a:
        return "open"
    if iq_a > table.contact.short_above_a:
        return "short"
    return "ok"


def contact_verdict(state: str, table: LimitTable) -> Verdict:
    soft = {"open": table.contact.open_soft_bin, "short": table.contact.short_soft_bin}
    if state not in soft:
        raise ValueError(f"contact_verdict needs state 'open' or 'short', got {state!r}")
    return Verdict(None, table.contact.hard_bin, soft[state], False, None, (), None,
                   f"contact: {state}")


def tester_fault_verdict(table: LimitTable, reason: str) -> Verdict:
    """The station, not the part, failed: retest bin, no pass/fail, no checks kept."""
    return Verdict(None, table.tester_fault_hard_bin, table.tester_fault_soft_bin, None, None,
                   (), None, f"tester fault: {reason}")


def _missing(results: Sequence[Result], grade: Grade) -> str:
    measured = {(r.param, r.region) for r in results}
    names = [lim.param + (f" {lim.region}" if lim.region else "")
             for lim in grade.limits if (lim.param, lim.region) not in measured]
    return ", ".join(names) or "nothing"

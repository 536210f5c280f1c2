"""Grading and binning on hand-made parts against a small table of our own (invented numbers)."""

from __future__ import annotations

import dataclasses
import math

import pytest

from station.config.limit_tables import Limit, parse_limit_table
from station.judge.grading import (
    Result,
    check_value,
    contact_state,
    contact_verdict,
    fails_loosest,
    grade_part,
    limit_for,
)
from station.judge.grading import (
    tester_fault_verdict as fault_verdict,  # short alias; pytest collects only test_* (pyproject)
)

TABLE = parse_limit_table("""\
product: TEST-2
regions:
  low:        {from: "V- - 0.1 V", to: "V+ - 1.6 V", kind: slope}
  transition: {from: "V+ - 1.6 V", to: "V+ - 1.0 V", kind: step}
  high:       {from: "V+ - 1.0 V", to: "V+ + 0.1 V", kind: slope}
hard_bins:
  1: {name: Grade A, pass: true}
  2: {name: Grade B, pass: true}
  5: {name: Parametric fail, pass: false}
  6: {name: Contact fail, pass: false}
  9: {name: Tester fault, pass: false}
fail_hard_bin: 5
contact: {open_below: 50 uA, short_above: 5 mA, open_soft_bin: 20, short_soft_bin: 21, hard_bin: 6}
tester_fault: {hard_bin: 9, soft_bin: 90}
grades:
  - name: A
    hard_bin: 1
    soft_bin: 1
    limits:
      - {param: iq, low: 300 uA, high: 600 uA, soft_bin: 10, bin: Iq}
      - {param: vos, low: -50 uV, high: 50 uV, soft_bin: 11, bin: Offset}
      - {param: cmrr, region: low, low: 120 dB, soft_bin: 12, bin: CMRR low}
      - {param: cm_step, region: transition, high: 150 uV, soft_bin: 14, bin: Step}
      - {param: aol, low: 120 dB, soft_bin: 17, bin: AOL}
  - name: B
    hard_bin: 2
    soft_bin: 2
    limits:
      - {param: iq, low: 300 uA, high: 600 uA, soft_bin: 10, bin: Iq}
      - {param: vos, low: -150 uV, high: 150 uV, soft_bin: 11, bin: Offset}
      - {param: cmrr, region: low, low: 110 dB, soft_bin: 12, bin: CMRR low}
      - {param: cm_step, region: transition, high: 300 uV, soft_bin: 14, bin: Step}
      - {param: aol, low: 114 dB, soft_bin: 17, bin: AOL}
""", file="grading_table.yaml")

# A part that passes grade A, in execution order; contact_iq and cmrr_slope carry no limit.
GOOD = [
    Result("contact_iq", None, 450e-6, 1001),
    Result("iq", None, 450e-6, 2001),
    Result("vos", None, 12e-6, 3001),
    Result("cmrr_slope", "low", 0.3e-6, 4001),
    Result("cmrr", "low", 130.0, 4002),
    Result("cm_step", "transition", 60e-6, 4003),
    Result("aol", None, 130.0, 5001),
]


def part(**changes: float) -> list[Result]:
    """GOOD with some values replaced: part(vos=1e-4, cmrr=100.0)."""
    return [dataclasses.replace(r, value=changes[r.param]) if r.param in changes else r for r in GOOD]


def test_good_part_takes_grade_a():
    verdict = grade_part(GOOD, TABLE)
    assert (verdict.grade, verdict.hard_bin, verdict.soft_bin, verdict.passed) == ("A", 1, 1, True)
    assert verdict.decided_by == "A" and verdict.failing is None and verdict.reason == "grade A"
    assert [c.result for c in verdict.checks] == GOOD
    by_param = {c.result.param: c for c in verdict.checks}
    assert by_param["contact_iq"].limit is None and by_param["contact_iq"].passed is None
    assert by_param["vos"].limit == limit_for(TABLE.grade("A"), "vos", None)
    assert by_param["vos"].passed is True


def test_part_passing_b_but_failing_a():
    verdict = grade_part(part(vos=100e-6), TABLE)
    assert (verdict.grade, verdict.hard_bin, verdict.soft_bin, verdict.passed) == ("B", 2, 2, True)
    assert verdict.decided_by == "B"
    vos_check = next(c for c in verdict.checks if c.result.param == "vos")
    assert vos_check.limit.high == pytest.approx(150e-6) and vos_check.passed is True


@pytest.mark.parametrize("param, bad, soft_bin", [
    ("iq", 700e-6, 10),
    ("iq", 100e-6, 10),
    ("vos", -200e-6, 11),
    ("cmrr", 105.0, 12),
    ("cm_step", 400e-6, 14),
    ("aol", 110.0, 17),
])
def test_each_failing_test_gives_its_soft_bin(param, bad, soft_bin):
    verdict = grade_part(part(**{param: bad}), TABLE)
    assert (verdict.grade, verdict.hard_bin, verdict.soft_bin, verdict.passed) == (None, 5, soft_bin, False)
    assert verdict.decided_by == "B"
    assert verdict.failing is not None and verdict.failing.result.param == param
    assert verdict.reason == f"fail: {verdict.failing.limit.bin_name} (soft bin {soft_bin})"


def test_first_failing_in_execution_order_decides():
    results = part(vos=-200e-6, aol=100.0)
    assert grade_part(results, TABLE).soft_bin == 11
    # The same results run in another order (aol first): the list order is what counts.
    reordered = [results[-1], *results[:-1]]
    verdict = grade_part(reordered, TABLE)
    assert verdict.soft_bin == 17 and verdict.failing.result.test_num == 5001


def test_failing_result_is_chosen_under_the_loosest_grade():
    # vos fails A only (passes B); aol fails B: the bin comes from aol, not from the earlier vos.
    verdict = grade_part(part(vos=100e-6, aol=112.0), TABLE)
    assert verdict.soft_bin == 17 and verdict.decided_by == "B"
    vos_check = next(c for c in verdict.checks if c.result.param == "vos")
    assert vos_check.passed is True


def test_overrange_fails():
    assert grade_part(part(vos=math.inf), TABLE).soft_bin == 11
    assert grade_part(part(cmrr=-math.inf), TABLE).soft_bin == 12  # over-range slope
    assert grade_part(part(cm_step=math.inf), TABLE).soft_bin == 14
    assert grade_part(part(cmrr=math.inf), TABLE).grade == "A"  # zero slope: perfect rejection


def test_nan_fails_every_limit():
    assert grade_part(part(aol=math.nan), TABLE).soft_bin == 17
    assert not check_value(math.nan, Limit("cmrr", "low", 110.0, None, "dB", 12, "x"))
    assert not check_value(math.nan, Limit("cm_step", "transition", None, 1e-4, "V", 14, "x"))


def test_check_value_is_inclusive_and_one_sided():
    window = Limit("iq", None, 300e-6, 600e-6, "A", 10, "Iq")
    assert check_value(300e-6, window) and check_value(600e-6, window)
    assert not check_value(299.9e-6, window) and not check_value(600.1e-6, window)
    floor = Limit("aol", None, 114.0, None, "dB", 17, "AOL")
    assert check_value(math.inf, floor) and not check_value(-math.inf, floor)
    ceiling = Limit("cm_step", "transition", None, 300e-6, "V", 14, "Step")
    assert check_value(-math.inf, ceiling) is True and not check_value(math.inf, ceiling)


def test_missing_measurement_blocks_the_grade():
    # Stopped early on the vos fail: aol never measured; the part fails on vos.
    stopped = part(vos=300e-6)[:3]
    verdict = grade_part(stopped, TABLE)
    assert (verdict.passed, verdict.soft_bin) == (False, 11)


def test_incomplete_part_without_a_fail_is_not_a_dut_fail():
    verdict = grade_part(GOOD[:-1], TABLE)  # aol missing, nothing failed
    assert verdict.passed is None and verdict.grade is None
    assert (verdict.hard_bin, verdict.soft_bin) == (9, 90)
    assert "aol" in verdict.reason and verdict.reason.startswith("tester fault:")


def test_fails_loosest_for_stop_on_fail():
    assert not fails_loosest(Result("vos", None, 100e-6, 3001), TABLE)  # B can still pass
    assert fails_loosest(Result("vos", None, 200e-6, 3001), TABLE)
    assert fails_loosest(Result("cmrr", "low", -math.inf, 4002), TABLE)
    assert not fails_loosest(Result("vos_cm", None, 1.0, 4101), TABLE)  # no limit at all
    assert not fails_loosest(Result("cmrr", "high", 50.0, 4005), TABLE)  # region not limited here


@pytest.mark.parametrize("iq, state", [
    (0.0, "open"), (49e-6, "open"), (50e-6, "ok"), (450e-6, "ok"),
    (5e-3, "ok"), (5.1e-3, "short"), (math.inf, "short"),
])
def test_contact_state(iq, state):
    assert contact_state(iq, TABLE) == state


def test_contact_state_refuses_nan():
    with pytest.raises(ValueError):
        contact_state(math.nan, TABLE)


def test_contact_verdicts():
    opened = contact_verdict("open", TABLE)
    shorted = contact_verdict("short", TABLE)
    assert (opened.hard_bin, opened.soft_bin, opened.passed, opened.reason) == (6, 20, False, "contact: open")
    assert (shorted.hard_bin, shorted.soft_bin, shorted.passed, shorted.reason) == (6, 21, False, "contact: short")
    with pytest.raises(ValueError):
        contact_verdict("ok", TABLE)


def test_tester_fault_is_never_a_dut_fail():
    verdict = fault_verdict(TABLE, "dmm timeout")
    assert verdict.passed is None and verdict.grade is None and verdict.checks == ()
    assert (verdict.hard_bin, verdict.soft_bin) == (9, 90)
    assert verdict.hard_bin != TABLE.fail_hard_bin
    assert not TABLE.hard_bins[verdict.hard_bin].passing
    assert verdict.reason == "tester fault: dmm timeout"

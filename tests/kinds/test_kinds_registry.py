"""The test kinds registry: the rows each kind lays out, how kinds run on a (fake) bench, and
what adding a kind takes."""

from __future__ import annotations

import math
import textwrap
from dataclasses import replace

import numpy as np
import pytest

from station.config.files import ConfigError
from station.config.limit_tables import LimitTable, load_limit_table
from station.config.plan import build_plan
from station.config.regions import fixed_region
from station.config.sequence import TestStep, load_sequence, parse_sequence
from station.config.test_catalog import StepRows, StepTests
from station.demo import DEMO_LIMITS, DEMO_SEQUENCE, demo_file
from station.kinds.base import KindContext, SiteWork, TestKind
from station.kinds.registry import KINDS, kind_of, step_tests
from station.lot.sweep_order import Condition

# The rows the station logged for the demo sequence before the kinds registry existed (its
# datalog of a seed-7 dry run): the datalogs and STDF files of earlier lots carry exactly
# these numbers and names, so they must never change.
LOGGED_BEFORE = """\
1001|Iq contact check|contact_iq|
2001|Vos at nominal supply|vos|
3101|Vos at VCM -5.100 V (V- - 0.1 V)|vos_cm|low
3102|Vos at VCM -4.000 V (V- + 1 V)|vos_cm|low
3103|Vos at VCM -2.000 V (V- + 3 V)|vos_cm|low
3104|Vos at VCM +0.000 V (mid)|vos_cm|low
3105|Vos at VCM +2.000 V (V+ - 3 V)|vos_cm|low
3106|Vos at VCM +3.000 V (V+ - 2 V)|vos_cm|low
3107|Vos at VCM +3.500 V (V+ - 1.5 V)|vos_cm|transition
3108|Vos at VCM +3.600 V (V+ - 1.4 V)|vos_cm|transition
3109|Vos at VCM +3.700 V (V+ - 1.3 V)|vos_cm|transition
3110|Vos at VCM +3.800 V (V+ - 1.2 V)|vos_cm|transition
3111|Vos at VCM +3.900 V (V+ - 1.1 V)|vos_cm|transition
3112|Vos at VCM +4.100 V (V+ - 0.9 V)|vos_cm|high
3113|Vos at VCM +4.400 V (V+ - 0.6 V)|vos_cm|high
3114|Vos at VCM +4.700 V (V+ - 0.3 V)|vos_cm|high
3115|Vos at VCM +5.100 V (V+ + 0.1 V)|vos_cm|high
3001|CMRR slope low region|cmrr_slope|low
3002|CMRR low region|cmrr|low
3003|Crossover offset step transition region|cm_step|transition
3004|Worst |Vos| transition region|vos_worst|transition
3005|CMRR slope high region|cmrr_slope|high
3006|CMRR high region|cmrr|high
3007|CMRR slope full range|cmrr_slope|full
3008|CMRR full range|cmrr|full
4101|Vos at Vout -3 V|vos_force|
4102|Vos at Vout +3 V|vos_force|
4001|AOL slope dVos/dVout|aol_slope|
4002|AOL|aol|
5101|Vos at span 8 V|vos_span|
5102|Vos at span 12 V|vos_span|
5001|PSRR slope dVos/dVs|psrr_slope|
5002|PSRR|psrr|
6001|Iq at nominal supply|iq|
"""
# Rows added since, after every row above (a new step is appended, so no earlier number moves).
ADDED_SINCE = """\
7101|Vos with Rb shunted|vos_rb|
7102|Vos with Rb in + input|vos_rb|
7103|Vos with Rb in - input|vos_rb|
7104|Vos with Rb in both inputs|vos_rb|
7001|Ib+ (+ input bias current)|ib_plus|
7002|Ib- (- input bias current)|ib_minus|
7003|Ib (mean input bias current)|ib|
7004|Ios (input offset current)|ios|
7005|Ios from both Rb in (check)|ios_both|
8001|buf33: error, direct sum|app_err|buf33
8002|buf33: error, RSS|app_err_rss|buf33
8003|buf33: offset term|app_err_vos|buf33
8004|buf33: common-mode term|app_err_cm|buf33
8005|buf33: output term|app_err_out|buf33
8006|buf33: bias term|app_err_ib|buf33
8007|buf_low: error, direct sum|app_err|buf_low
8008|buf_low: error, RSS|app_err_rss|buf_low
8009|buf_low: offset term|app_err_vos|buf_low
8010|buf_low: common-mode term|app_err_cm|buf_low
8011|buf_low: output term|app_err_out|buf_low
8012|buf_low: bias term|app_err_ib|buf_low
8013|gain10: error, direct sum|app_err|gain10
8014|gain10: error, RSS|app_err_rss|gain10
8015|gain10: offset term|app_err_vos|gain10
8016|gain10: common-mode term|app_err_cm|gain10
8017|gain10: output term|app_err_out|gain10
8018|gain10: bias term|app_err_ib|gain10
8019|inv5: error, direct sum|app_err|inv5
8020|inv5: error, RSS|app_err_rss|inv5
8021|inv5: offset term|app_err_vos|inv5
8022|inv5: common-mode term|app_err_cm|inv5
8023|inv5: output term|app_err_out|inv5
8024|inv5: bias term|app_err_ib|inv5
"""


def _demo_context() -> tuple[KindContext, LimitTable]:
    table = load_limit_table(DEMO_LIMITS)
    return KindContext(load_sequence(DEMO_SEQUENCE).span_v, table.regions), table


def test_demo_plan_logs_the_same_numbers_and_names_as_before() -> None:
    plan = build_plan(demo_file("benches", "example-bench.yaml"), DEMO_SEQUENCE, DEMO_LIMITS)
    logged = [f"{t.test_num}|{t.test_txt}|{t.param}|{t.region or ''}" for t in plan.tests]
    assert logged == LOGGED_BEFORE.splitlines() + ADDED_SINCE.splitlines()


def test_every_sequence_kind_is_registered_under_its_own_name() -> None:
    # The servo-loop demo sequence runs every kind measured in the servo loop or in any fixture.
    sequence = load_sequence(DEMO_SEQUENCE)
    assert {step.kind for step in sequence.tests} == {n for n, k in KINDS.items() if k.fixture != "diff_amp"}
    assert all(name == kind.name for name, kind in KINDS.items())


class _FakeScreen:
    """A StepScreen whose loop offsets follow a given function of the condition."""

    def __init__(self, context: KindContext, table: LimitTable, offset=None, iq=None) -> None:
        self._context, self._table = context, table
        self.offset = offset or (lambda site, condition: 0.0)
        self.iq = iq or (lambda site, attempt: 450e-6)
        self.powered: list[set[int]] = []
        self.reseated: list[int] = []
        self.swept: list[list[Condition]] = []
        self._attempts: dict[int, int] = {}

    @property
    def context(self) -> KindContext:
        return self._context

    @property
    def table(self) -> LimitTable:
        return self._table

    def set_rails(self, v_pos: float, v_neg: float) -> None:
        pass

    def sweep(self, step, sites, conditions):
        self.swept.append(list(conditions))
        return {s: [self.offset(s, c) for c in conditions] for s in sites}

    def measure_iq(self, site: int, wait_s: float) -> float:
        attempt = self._attempts.get(site, 0)
        self._attempts[site] = attempt + 1
        return self.iq(site, attempt)

    def power_sites(self, sites: set[int]) -> None:
        self.powered.append(set(sites))

    def reseat(self, site: int) -> None:
        self.reseated.append(site)


def _step(kind: str) -> TestStep:
    return next(s for s in load_sequence(DEMO_SEQUENCE).tests if s.kind == kind)


def test_gain_kind_reads_each_level_and_fits_the_slope() -> None:
    context, table = _demo_context()
    step = _step("gain")
    slope, offset = 2.5e-7, 12e-6   # invented part: AOL = 1 / 2.5e-7 = 4e6 V/V
    screen = _FakeScreen(context, table, offset=lambda site, c: offset + slope * c[1] + 1e-9 * site)
    parts = [SiteWork(1, "P1"), SiteWork(2, "P2")]
    tests = step_tests(step, context)
    kind_of(step).run(step, tests, screen, parts)
    assert [c[1] for c in screen.swept[0]] == list(step.levels_v)  # force levels, in written order
    for part in parts:
        levels = [test.cond for test, _ in part.raw]
        readings = [value for _, value in part.raw]
        figures = {test.param: value for test, value in part.figures}
        # Reference: numpy.polyfit (degree 1) for the slope; AOL in dB is -20 log10 |slope|
        # (MIL-STD-883 TM 4004, from memory; 20 log10(4e6) = 132.04 dB is arithmetic).
        assert figures["aol_slope"] == pytest.approx(np.polyfit(levels, readings, 1)[0], rel=1e-9)
        assert figures["aol"] == pytest.approx(20 * math.log10(4e6), abs=1e-6)


def test_contact_kind_reseats_an_open_part_and_powers_only_good_sites() -> None:
    context, table = _demo_context()
    step = _step("contact")
    assert step.retest == 1
    currents = {1: [20e-6, 450e-6],   # open, then fine after the re-seat
                2: [450e-6],           # fine at once
                3: [9e-3, 9e-3]}       # shorted both times
    screen = _FakeScreen(context, table, iq=lambda site, attempt: currents[site][attempt])
    parts = [SiteWork(site, f"P{site}") for site in (1, 2, 3)]
    kind_of(step).run(step, step_tests(step, context), screen, parts)
    assert [p.contact for p in parts] == ["ok", "ok", "short"]
    assert screen.reseated == [1, 3]
    assert screen.powered[-1] == {1, 2}
    assert [value for p in parts for _, value in p.figures] == [450e-6, 450e-6, 9e-3]


def test_cm_sweep_check_refuses_a_point_outside_every_region() -> None:
    text = textwrap.dedent("""\
        sequence: s1
        product: PX-401
        supply: {span: 10 V}
        tests:
          - kind: cm_sweep
            points: ["V- - 0.1 V", "mid", "V+ + 0.5 V"]
        """)
    sequence = parse_sequence(text, "s.yaml")
    step = sequence.tests[0]
    regions = (fixed_region("low", "slope", -5.1, 5.1),)
    with pytest.raises(ConfigError, match=r"s\.yaml:5: .*'V\+ \+ 0\.5 V' lies outside every region"):
        kind_of(step).check(step, sequence, KindContext(10.0, regions))


def test_cm_sweep_check_refuses_a_region_without_enough_points() -> None:
    text = textwrap.dedent("""\
        sequence: s1
        product: PX-401
        supply: {span: 10 V}
        tests:
          - kind: cm_sweep
            points: ["V- - 0.1 V", "mid", "V+ + 0.1 V"]
        """)
    sequence = parse_sequence(text, "s.yaml")
    step = sequence.tests[0]
    regions = (fixed_region("low", "slope", -5.1, 3.4), fixed_region("transition", "step", 3.4, 4.0),
               fixed_region("high", "slope", 4.0, 5.1))
    # No point between 3.4 V and 4.0 V: the crossover step cannot be measured.
    with pytest.raises(ConfigError, match=r"s\.yaml:5: .*region 'transition' has 0 common-mode points; "
                                          r"it needs at least 1"):
        kind_of(step).check(step, sequence, KindContext(10.0, regions))


def test_gain_kind_refuses_levels_outside_the_output_swing() -> None:
    text = textwrap.dedent("""\
        sequence: s1
        product: PX-401
        supply: {span: 10 V}
        tests:
          - kind: gain
            levels: [-3 V, 5 V]
        """)
    sequence = parse_sequence(text, "s.yaml")
    with pytest.raises(ConfigError, match="gain level 5 V is outside the output swing of a 10 V span"):
        kind_of(sequence.tests[0]).check_safety(sequence.tests[0], sequence)


class _HoldCurrent(TestKind):
    """A kind made up for this test: one figure, the supply current after a fixed hold."""

    name = "hold_current"
    title = "Hold current"

    def lay_out(self, step: TestStep, rows: StepRows, context: KindContext) -> None:
        rows.raw_point("Iq at hold start", "contact_iq")
        rows.figure("Iq after hold", "iq")

    def run(self, step: TestStep, tests: StepTests, screen, parts: list[SiteWork]) -> None:
        for part in parts:
            part.raw.append((tests.raw[0], screen.measure_iq(part.site, 0.0)))
            part.figures.append((tests.figures[0], screen.measure_iq(part.site, 0.1)))


def test_a_new_kind_is_one_class_and_one_registry_entry(monkeypatch) -> None:
    monkeypatch.setitem(KINDS, _HoldCurrent.name, _HoldCurrent())
    context, table = _demo_context()
    step = replace(_step("supply_current"), kind="hold_current", index=7)
    tests = step_tests(step, context)
    # Numbered like every kind's rows: figures k*1000 + 1.., raw points k*1000 + 101..
    assert [(t.test_num, t.test_txt) for t in tests.in_order] == [(7101, "Iq at hold start"),
                                                                  (7001, "Iq after hold")]
    screen = _FakeScreen(context, table, iq=lambda site, attempt: [400e-6, 410e-6][attempt])
    part = SiteWork(1, "P1")
    kind_of(step).run(step, tests, screen, [part])
    assert [v for _, v in part.figures] == [410e-6]

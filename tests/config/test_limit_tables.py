"""Limit tables: the demo table loads; every class of error is one line naming file, line, entry."""

from __future__ import annotations

from pathlib import Path

import pytest

from station.config.files import ConfigError
from station.config.limit_tables import load_limit_table, parse_limit_table
from station.config.rail_points import RailPoint

ROOT = Path(__file__).resolve().parents[2]

# A small table of our own (invented numbers), mutated by each error test below.
BASE = """\
product: TEST-1
note: invented test table
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
  - name: B
    hard_bin: 2
    soft_bin: 2
    limits:
      - {param: iq, low: 300 uA, high: 600 uA, soft_bin: 10, bin: Iq}
      - {param: vos, low: -150 uV, high: 150 uV, soft_bin: 11, bin: Offset}
      - {param: cmrr, region: low, low: 110 dB, soft_bin: 12, bin: CMRR low}
"""
FILE = "bad_limits.yaml"


def line_no(text: str, fragment: str) -> int:
    """1-based line of the first line holding `fragment` (the line the error must name)."""
    for number, line in enumerate(text.splitlines(), start=1):
        if fragment in line:
            return number
    raise AssertionError(f"{fragment!r} not in text")


def error_for(old: str, new: str) -> tuple[str, str]:
    assert old in BASE, old
    text = BASE.replace(old, new, 1)
    with pytest.raises(ConfigError) as info:
        parse_limit_table(text, file=FILE)
    message = str(info.value)
    assert "\n" not in message
    return text, message


def assert_names(message: str, text: str, fragment: str, key: str) -> None:
    assert message.startswith(f"{FILE}:{line_no(text, fragment)}: {key}: "), message


def test_base_table_loads():
    table = parse_limit_table(BASE, file=FILE)
    assert [g.name for g in table.grades] == ["A", "B"]
    assert table.source == FILE


def test_demo_table_loads():
    table = load_limit_table(ROOT / "limits" / "px401.yaml")
    assert table.product == "PX-401"
    assert [g.name for g in table.grades] == ["A", "B"]
    assert table.loosest.name == "B"
    assert [(r.name, r.kind) for r in table.regions] == [("low", "slope"), ("transition", "step"),
                                                         ("high", "slope")]
    bounds = {r.name: r.vcm_range(10.0) for r in table.regions}
    assert bounds["low"] == pytest.approx((-5.1, 3.4))
    assert bounds["transition"] == pytest.approx((3.4, 4.0))
    assert bounds["high"] == pytest.approx((4.0, 5.1))
    assert table.regions[0].lower == RailPoint("V-", -0.1)
    vos_a = next(lim for lim in table.grade("A").limits if lim.param == "vos")
    assert (vos_a.low, vos_a.high, vos_a.units) == (pytest.approx(-50e-6), pytest.approx(50e-6), "V")
    cmrr_low_a = next(lim for lim in table.grade("A").limits if (lim.param, lim.region) == ("cmrr", "low"))
    assert (cmrr_low_a.low, cmrr_low_a.high, cmrr_low_a.units) == (120.0, None, "dB")
    assert table.hard_bins[1].passing and not table.hard_bins[table.fail_hard_bin].passing
    assert table.soft_bins[1].passing and table.soft_bins[12].name == "CMRR low region"
    assert not table.soft_bins[table.contact.open_soft_bin].passing
    assert table.contact.open_below_a == pytest.approx(50e-6)
    assert table.tester_fault_soft_bin in table.soft_bins
    with pytest.raises(KeyError, match="grades: A, B"):
        table.grade("C")


def test_demo_table_says_it_is_invented():
    assert "INVENTED" in (ROOT / "limits" / "px401.yaml").read_text(encoding="utf-8")


def test_region_bounds_follow_the_span():
    table = parse_limit_table(BASE)
    transition = next(r for r in table.regions if r.name == "transition")
    assert transition.vcm_range(20.0) == pytest.approx((8.4, 9.0))


def test_missing_file():
    with pytest.raises(ConfigError, match="nope.yaml: file not found"):
        load_limit_table("nope.yaml")


def test_unknown_key():
    text, message = error_for("    soft_bin: 1\n", "    soft_bin: 1\n    sof_bin: 3\n")
    assert_names(message, text, "sof_bin", "grades[0].sof_bin")
    assert "unknown key" in message


def test_unknown_parameter_lists_the_known_ones():
    text, message = error_for("{param: vos, low: -50 uV", "{param: voss, low: -50 uV")
    assert_names(message, text, "voss", "grades[0].limits[1].param")
    assert "'voss' is not a known parameter" in message
    assert "aol, app_err, app_err_rss, cm_step, cmrr, cmrr_ac, cmrr_ac_f3db, cmrr_da, ib, ib_minus, ib_plus, ios, iq, psrr, vos, vos_worst" in message


def test_unlimitable_parameter():
    text, message = error_for("{param: vos, low: -50 uV", "{param: cmrr_slope, low: -50 uV")
    assert_names(message, text, "cmrr_slope", "grades[0].limits[1].param")
    assert "cannot be limited" in message


def test_unknown_region():
    text, message = error_for("{param: cmrr, region: low, low: 120", "{param: cmrr, region: lo, low: 120")
    assert_names(message, text, "region: lo,", "grades[0].limits[2].region")
    assert "unknown region 'lo'" in message and "low, high, full" in message


def test_region_of_the_wrong_kind():
    text, message = error_for("{param: cmrr, region: low, low: 120", "{param: cmrr, region: transition, low: 120")
    assert_names(message, text, "region: transition, low: 120", "grades[0].limits[2].region")
    assert "'transition' is a step region; cmrr takes slope regions" in message
    text, message = error_for("{param: cm_step, region: transition", "{param: cm_step, region: low")
    assert_names(message, text, "cm_step, region: low", "grades[0].limits[3].region")
    assert "cm_step takes region: transition" in message


def test_region_on_a_parameter_without_regions():
    text, message = error_for("{param: vos, low: -50 uV", "{param: vos, region: low, low: -50 uV")
    assert_names(message, text, "vos, region: low", "grades[0].limits[1].region")
    assert "vos takes no region" in message


def test_region_missing_for_cmrr():
    text, message = error_for("{param: cmrr, region: low, low: 110", "{param: cmrr, low: 110")
    assert_names(message, text, "{param: cmrr, low: 110", "grades[1].limits[2]")
    assert "cmrr needs a region" in message


def test_low_above_high():
    text, message = error_for("low: -150 uV, high: 150 uV", "low: 160 uV, high: 150 uV")
    assert_names(message, text, "low: 160 uV", "grades[1].limits[1].low")
    assert "vos low limit 160 uV is above the high limit 150 uV" in message


def test_neither_low_nor_high():
    text, message = error_for("{param: cm_step, region: transition, high: 150 uV,",
                              "{param: cm_step, region: transition,")
    assert_names(message, text, "{param: cm_step", "grades[0].limits[3]")
    assert "neither low nor high" in message


def test_units_that_do_not_fit():
    text, message = error_for("low: -50 uV, high: 50 uV", "low: -50 uV, high: 50 uA")
    assert_names(message, text, "high: 50 uA", "grades[0].limits[1].high")
    assert "vos limit" in message and "'50 uA'" in message and "V" in message
    text, message = error_for("region: low, low: 120 dB", "region: low, low: 120 uV")
    assert_names(message, text, "low: 120 uV", "grades[0].limits[2].low")
    assert "dB" in message
    text, message = error_for("open_below: 50 uA", "open_below: 50 uV")
    assert_names(message, text, "contact:", "contact.open_below")
    assert "'50 uV' does not fit here" in message


def test_value_that_is_not_a_quantity():
    text, message = error_for("region: low, low: 120 dB", "region: low, low: [120]")
    assert_names(message, text, "low: [120]", "grades[0].limits[2].low")
    assert "expected a value in dB such as '120 dB'" in message


def test_overlapping_regions():
    text, message = error_for('transition: {from: "V+ - 1.6 V"', 'transition: {from: "V+ - 1.8 V"')
    assert_names(message, text, "transition:", "regions.transition.from")
    assert "overlaps 'low'" in message


def test_gap_between_regions():
    text, message = error_for('high:       {from: "V+ - 1.0 V"', 'high:       {from: "V+ - 0.9 V"')
    assert_names(message, text, "high:", "regions.high.from")
    assert "gap between region 'transition'" in message


def test_regions_that_tile_only_at_the_nominal_span():
    # V- + 8.4 V equals V+ - 1.6 V at a 10 V span only.
    text, message = error_for('transition: {from: "V+ - 1.6 V"', 'transition: {from: "V- + 8.4 V"')
    assert_names(message, text, "transition:", "regions.transition.from")
    assert "at a 10 V span only" in message


def test_regions_listed_out_of_order():
    text = BASE.replace('  high:       {from: "V+ - 1.0 V", to: "V+ + 0.1 V", kind: slope}\n', "")
    text = text.replace("regions:\n", 'regions:\n  high:       {from: "V+ - 1.0 V", to: "V+ + 0.1 V", kind: slope}\n')
    with pytest.raises(ConfigError) as info:
        parse_limit_table(text, file=FILE)
    assert_names(str(info.value), text, "  low:", "regions.low")
    assert "low to high" in str(info.value)


def test_region_ending_below_its_start():
    text, message = error_for('to: "V+ - 1.0 V", kind: step', 'to: "V+ - 1.7 V", kind: step')
    assert_names(message, text, "transition:", "regions.transition")
    assert "not above its start" in message


def test_region_named_full_is_reserved():
    text, message = error_for("  high:       {from", "  full:       {from")
    assert_names(message, text, "  full:", "regions.full")
    assert "reserved" in message


def test_same_parameter_and_region_twice_in_a_grade():
    text, message = error_for("      - {param: cmrr, region: low, low: 110 dB, soft_bin: 12, bin: CMRR low}\n",
                              "      - {param: cmrr, region: low, low: 110 dB, soft_bin: 12, bin: CMRR low}\n"
                              "      - {param: cmrr, region: low, low: 112 dB, soft_bin: 12, bin: CMRR low}\n")
    assert_names(message, text, "low: 112 dB", "grades[1].limits[3]")
    assert "cmrr in region 'low' twice" in message


def test_soft_bin_with_two_names():
    text, message = error_for("high: 50 uV, soft_bin: 11, bin: Offset}", "high: 50 uV, soft_bin: 11, bin: Vos}")
    # The two entries are read in file order: grade B's Offset is the second name.
    assert_names(message, text, "low: -150 uV", "grades[1].limits[1].soft_bin")
    assert f"soft bin 11 has two names: 'Vos' (line {line_no(text, 'bin: Vos')}) and 'Offset'" in message


def test_failure_soft_bin_equal_to_a_pass_soft_bin():
    text, message = error_for("soft_bin: 14, bin: Step", "soft_bin: 2, bin: Step")
    assert_names(message, text, "bin: Step", "grades[0].limits[3].soft_bin")
    assert f"soft bin 2 ('Step') is already taken by 'Grade B' (line {line_no(text, '    soft_bin: 2')})" in message


def test_contact_soft_bin_colliding_with_tester_fault():
    text, message = error_for("tester_fault: {hard_bin: 9, soft_bin: 90}", "tester_fault: {hard_bin: 9, soft_bin: 21}")
    assert_names(message, text, "tester_fault:", "tester_fault.soft_bin")
    assert "'Contact short'" in message


def test_hard_bin_not_defined():
    text, message = error_for("fail_hard_bin: 5", "fail_hard_bin: 7")
    assert_names(message, text, "fail_hard_bin", "fail_hard_bin")
    assert "hard bin 7 is not defined" in message


def test_passing_grade_on_a_hard_bin_not_marked_pass():
    text, message = error_for("2: {name: Grade B, pass: true}", "2: {name: Grade B, pass: false}")
    assert_names(message, text, "    hard_bin: 2", "grades[1].hard_bin")
    assert "not marked pass" in message


def test_fail_bin_marked_pass():
    text, message = error_for("6: {name: Contact fail, pass: false}", "6: {name: Contact fail, pass: true}")
    assert_names(message, text, "contact:", "contact.hard_bin")
    assert "a contact fail goes to hard bin 6" in message and "marked pass" in message


def test_tester_fault_needs_a_hard_bin_of_its_own():
    text, message = error_for("tester_fault: {hard_bin: 9", "tester_fault: {hard_bin: 5")
    assert_names(message, text, "tester_fault:", "tester_fault.hard_bin")
    assert "never a DUT fail" in message


def test_contact_thresholds_in_order():
    text, message = error_for("short_above: 5 mA", "short_above: 20 uA")
    assert_names(message, text, "contact:", "contact")
    assert "open_below (50 uA) must be below short_above (20 uA)" in message


def test_no_grades():
    text = BASE[:BASE.index("grades:")] + "grades: []\n"
    with pytest.raises(ConfigError) as info:
        parse_limit_table(text, file=FILE)
    assert_names(str(info.value), text, "grades:", "grades")
    assert "no grades" in str(info.value)


def test_duplicate_grade_names():
    text, message = error_for("  - name: B", "  - name: A")
    assert text.count("name: A") == 2
    assert message.startswith(f"{FILE}:{text.splitlines().index('  - name: A', 20) + 1}: grades[1].name: ")
    assert "grade 'A' is listed twice" in message


def test_yaml_syntax_error_names_the_line():
    text, message = error_for("  1: {name: Grade A, pass: true}", "  1: {name: Grade A, pass: true")
    assert message.startswith(f"{FILE}:")
    assert "YAML syntax error" in message

"""Bad values that used to get through the loaders: non-finite and absurd quantities, duplicate
keys, dimensionless units read as volts, limits beyond what the instruments can do, and hard
bins the handler cannot sort to. Each must be refused at load (or when the lot's plan is built)
as one line naming the file, the line and the key, before anything is powered or written.
"""

from __future__ import annotations

from pathlib import Path

import pytest

from drivers.handler import MAX_BIN
from drivers.supply import INSTRUMENT_MAX_A, INSTRUMENT_MAX_V, INSTRUMENT_MIN_A
from station.config.bench_config import parse_bench_config
from station.config.files import ConfigError
from station.config.limit_tables import parse_limit_table
from station.config.plan import build_plan
from station.config.sequence import parse_sequence
from station.demo import DEMO_LIMITS, DEMO_SEQUENCE
from station.errors import EXIT_REFUSED, exit_code_of

SEQUENCE = DEMO_SEQUENCE.read_text(encoding="utf-8")
LIMITS = DEMO_LIMITS.read_text(encoding="utf-8")
BENCH = """\
station: test-bench
instruments:
  supply:  {resource: "TCPIP0::127.0.0.1::40001::SOCKET", driver: scpi-dual-supply}
  force:   {resource: "TCPIP0::127.0.0.1::40002::SOCKET", driver: scpi-force-source}
  dmm:
    - {resource: "TCPIP0::127.0.0.1::40003::SOCKET", driver: scpi-dmm}
  switch:  {resource: "TCPIP0::127.0.0.1::40005::SOCKET", driver: scpi-fixture-switch}
  handler: {resource: "TCPIP0::127.0.0.1::40006::SOCKET", driver: scpi-handler}
fixture: {rf: 100 kOhm, rs: 100 Ohm, sites: 1, line_frequency: 50 Hz}
safety:
  max_rail: 12 V
  current_compliance: 20 mA
"""
LOADERS = {"sequence": (parse_sequence, SEQUENCE), "limits": (parse_limit_table, LIMITS),
           "bench": (parse_bench_config, BENCH)}


def line_no(text: str, fragment: str, occurrence: int = 1) -> int:
    """1-based line of the `occurrence`-th line holding `fragment`."""
    found = [n for n, line in enumerate(text.splitlines(), start=1) if fragment in line]
    assert len(found) >= occurrence, f"{fragment!r} not in text {occurrence} times"
    return found[occurrence - 1]


def refusal(name: str, old: str, new: str) -> tuple[str, str]:
    loader, base = LOADERS[name]
    assert old in base, old
    text = base.replace(old, new, 1)
    with pytest.raises(ConfigError) as info:
        loader(text, "f.yaml")
    message = str(info.value)
    assert "\n" not in message
    return text, message


def assert_points_at(message: str, line: int, key: str) -> None:
    assert message.startswith(f"f.yaml:{line}: {key}: "), message


# ---- 3. non-finite and absurd values ---------------------------------------------------------

@pytest.mark.parametrize(("old", "new", "fragment", "key"), [
    ("    average: 4\n  - kind: cm_sweep", "    average: 4\n    settle: {wait: nan s}\n  - kind: cm_sweep",
     "settle: {wait", "tests[1].settle.wait"),
    ("  max: 500 ms", '  max: "1e400 s"', "max:", "settle.max"),
    ("  max: 500 ms", "  max: .inf", "max:", "settle.max"),
    ("  tail: 40 ms", "  tail: 1e9 s", "tail:", "settle.tail"),
    ("  span: 10 V", "  span: nan V", "span:", "supply.span"),
    ("  span: 10 V", "  span: 1e400 V", "span:", "supply.span"),
    ("  compliance: 20 mA", "  compliance: nan A", "compliance:", "supply.compliance"),
    ("  compliance: 20 mA", "  compliance: 1 uA", "compliance:", "supply.compliance"),
    ("    levels: [-3 V, 3 V]", "    levels: [-3 V, inf V]", "levels:", "tests[3].levels[1]"),
    ("    levels: [-3 V, 3 V]", "    levels: [-3 V, 11 V]", "levels:", "tests[3].levels[1]"),
    ("    spans: [8 V, 12 V]", "    spans: [8 V, 1e300 V]", "spans:", "tests[4].spans[1]"),
    ('      - "V- + 1 V"', '      - "V- + nan V"', '"V- + nan V"', "tests[2].points[1]"),
    ("  range: 10 V", "  range: 5 V", "range:", "dmm.range"),   # not a range the DMM has
])
def test_sequence_refuses_non_finite_and_absurd_values(old, new, fragment, key):
    text, message = refusal("sequence", old, new)
    assert_points_at(message, line_no(text, fragment), key)


@pytest.mark.parametrize(("old", "new", "key"), [
    ("high: 50 uV,", 'high: "nan uV",', "grades[0].limits[1].high"),
    ("high: 50 uV,", "high: .nan,", "grades[0].limits[1].high"),
    ("low: 120 dB,", "low: 1e400 dB,", "grades[0].limits[2].low"),
    ("low: 120 dB,", "low: inf,", "grades[0].limits[2].low"),
    ("high: 50 uV,", "high: 1e30 uV,", "grades[0].limits[1].high"),
    ("open_below: 50 uA", "open_below: nan A", "contact.open_below"),
    ("short_above: 5 mA", "short_above: 1e300 A", "contact.short_above"),
    ('{from: "V- - 0.1 V"', '{from: "V- - nan V"', "regions.low.from"),
])
def test_limit_table_refuses_non_finite_and_absurd_limits(old, new, key):
    text, message = refusal("limits", old, new)
    assert_points_at(message, line_no(text, new.split(",")[0]), key)


@pytest.mark.parametrize(("old", "new", "key"), [
    ("current_compliance: 20 mA", "current_compliance: nan A", "safety.current_compliance"),
    ("current_compliance: 20 mA", "current_compliance: 1e400 A", "safety.current_compliance"),
    ("max_rail: 12 V", "max_rail: .nan", "safety.max_rail"),
    ("rf: 100 kOhm", "rf: inf Ohm", "fixture.rf"),
])
def test_bench_refuses_non_finite_values_naming_file_and_line(old, new, key):
    text, message = refusal("bench", old, new)
    assert_points_at(message, line_no(text, new.split(":")[0].split(",")[0].strip()), key)


# ---- 4. duplicate keys -----------------------------------------------------------------------

def test_second_safety_block_in_a_bench_is_refused_at_its_line():
    text, message = refusal("bench", "safety:\n", "safety:\n  max_rail: 12 V\n  current_compliance: 20 mA\n"
                            "safety:\n")
    assert_points_at(message, line_no(text, "safety:", 2), "safety")
    assert "twice" in message


def test_second_grades_block_in_a_limit_table_is_refused_at_its_line():
    text = LIMITS + "grades:\n  - {name: Z, hard_bin: 1, soft_bin: 1, limits: []}\n"
    with pytest.raises(ConfigError) as info:
        parse_limit_table(text, "f.yaml")
    assert_points_at(str(info.value), line_no(text, "grades:", 2), "grades")


def test_duplicate_key_inside_a_flow_mapping_is_refused():
    text, message = refusal("sequence", "supply:\n  span: 10 V\n", "supply:\n  span: 10 V\n  span: 20 V\n")
    assert_points_at(message, line_no(text, "span:", 2), "supply.span")


def test_hard_bin_written_once_as_number_and_once_quoted_is_refused():
    text, message = refusal("limits", "  2: {name: Grade B, pass: true}\n",
                            "  2: {name: Grade B, pass: true}\n  '2': {name: Other, pass: false}\n")
    assert_points_at(message, line_no(text, "'2':"), "hard_bins.2")


# ---- 5. dimensionless units ------------------------------------------------------------------

@pytest.mark.parametrize("value", ["10 percent", "10 ppm", "10 radian", "10 dimensionless", "10 %"])
def test_dimensionless_unit_is_not_read_as_volts(value):
    text, message = refusal("sequence", "  span: 10 V", f"  span: {value}")
    assert_points_at(message, line_no(text, "span:"), "supply.span")


def test_dimensionless_unit_is_not_read_as_a_limit_in_volts():
    text, message = refusal("limits", "high: 50 uV,", "high: 50 percent,")
    assert_points_at(message, line_no(text, "50 percent"), "grades[0].limits[1].high")


# ---- C. one set of bench safety limits (the drivers' own) ----------------------------------

def test_bench_max_rail_above_the_supply_instrument_is_refused_and_says_its_limit():
    text, message = refusal("bench", "max_rail: 12 V", f"max_rail: {INSTRUMENT_MAX_V + 1:g} V")
    assert_points_at(message, line_no(text, "max_rail"), "safety.max_rail")
    assert f"{INSTRUMENT_MAX_V:g} V" in message
    parse_bench_config(BENCH.replace("max_rail: 12 V", f"max_rail: {INSTRUMENT_MAX_V:g} V"))


@pytest.mark.parametrize("amps", [INSTRUMENT_MAX_A * 2, INSTRUMENT_MIN_A / 2])
def test_bench_compliance_outside_the_supply_instrument_is_refused(amps):
    text, message = refusal("bench", "current_compliance: 20 mA", f"current_compliance: {amps!r}")
    assert_points_at(message, line_no(text, "current_compliance"), "safety.current_compliance")
    assert "mA" in message


# ---- D. hard bins the handler cannot sort to ---------------------------------------------

def test_lot_with_a_hard_bin_beyond_the_handler_is_refused_before_anything_runs(tmp_path: Path):
    # `station limits check` accepts it (STDF bins go to 32767: STDF V4 HBR, from memory); the
    # handler takes 1-99.
    limits = LIMITS.replace("  9: {name: Tester fault - retest", f"  {MAX_BIN + 1}: {{name: Tester fault - retest")
    limits = limits.replace("tester_fault: {hard_bin: 9,", f"tester_fault: {{hard_bin: {MAX_BIN + 1},")
    parse_limit_table(limits)
    files = {"bench.yaml": BENCH, "sequence.yaml": SEQUENCE, "limits.yaml": limits}
    for name, text in files.items():
        (tmp_path / name).write_text(text, encoding="utf-8")
    with pytest.raises(ConfigError) as info:
        build_plan(tmp_path / "bench.yaml", tmp_path / "sequence.yaml", tmp_path / "limits.yaml")
    message = str(info.value)
    line = line_no(limits, "tester_fault: {hard_bin")
    assert message.startswith(f"{tmp_path / 'limits.yaml'}:{line}: tester_fault.hard_bin: "), message
    assert f"1 to {MAX_BIN}" in message
    assert exit_code_of(info.value) == EXIT_REFUSED

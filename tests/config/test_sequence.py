"""The sequence loader: the demo sequence, every class of bad input, and the safety check."""

from __future__ import annotations

import pytest

from station.config.files import ConfigError
from station.config.sequence import (
    check_bench_safety,
    load_sequence,
    parse_sequence,
)
from station.demo import DEMO_SEQUENCE

GOOD = """\
sequence: s1
product: PX-401
supply: {span: 10 V, compliance: 20 mA}
tests:
  - kind: contact
  - kind: offset
  - kind: cm_sweep
    points: ["V- - 0.1 V", "mid", "V+ + 0.1 V"]
  - kind: gain
    levels: [-3 V, 3 V]
"""


def test_demo_sequence_loads_with_rail_relative_points() -> None:
    seq = load_sequence(DEMO_SEQUENCE)
    assert [t.kind for t in seq.tests] == ["contact", "offset", "cm_sweep", "gain", "supply_rejection",
                                           "supply_current", "bias_current", "budget"]
    sweep = seq.steps("cm_sweep")[0]
    vcms = sweep.point_vcms(seq.span_v)
    # "V- - 0.1 V" at a 10 V span is 0.1 V below the lower rail: -5.1 V from the mid-point.
    assert vcms[0] == pytest.approx(-5.1)
    assert vcms[-1] == pytest.approx(5.1)
    assert seq.tests[0].settle.adaptive


def test_range_sweep_spreads_points_evenly() -> None:
    text = GOOD.replace('points: ["V- - 0.1 V", "mid", "V+ + 0.1 V"]',
                        "range: {from: 'V- - 0.1 V', to: 'V+ + 0.1 V', count: 5}")
    vcms = parse_sequence(text).steps("cm_sweep")[0].point_vcms(10.0)
    assert vcms == pytest.approx([-5.1, -2.55, 0.0, 2.55, 5.1])


@pytest.mark.parametrize(("change", "line", "expected"), [
    (("kind: offset", "kind: offsett"), 6, "unknown test kind 'offsett'"),
    (("supply: {span: 10 V, compliance: 20 mA}", "supply: {span: 10 mA}"), 3, "does not fit here"),
    (('"mid"', '"middle"'), 8, "cannot read 'middle' as a common-mode point"),
    (("levels: [-3 V, 3 V]", "levels: [3 V]"), 10, "at least two output levels"),
    (("  - kind: offset\n", "  - kind: offset\n    averaging: 3\n"), 7, "unknown key"),
    (("product: PX-401\n", ""), 1, "required key 'product' is missing"),
    (("  - kind: gain\n", "  - kind: gain\n    nplc: 500\n"), 10, "NPLC must be from 0.02 to 100"),
    (("  - kind: offset\n", "  - kind: offset\n    settle: {wait: 10 ms, stable_within: 1 uV}\n"), 7,
     "either 'wait'"),
    (("tests:\n", "tests: [\n"), None, "YAML syntax error"),
])
def test_bad_sequence_gives_one_clear_line(change: tuple[str, str], line: int | None, expected: str) -> None:
    text = GOOD.replace(*change)
    assert text != GOOD
    with pytest.raises(ConfigError) as info:
        parse_sequence(text, "bad.yaml")
    message = str(info.value)
    assert expected in message
    assert message.startswith("bad.yaml")
    if line is not None:
        assert message.startswith(f"bad.yaml:{line}:"), message


def test_contact_must_come_first_and_kinds_only_once() -> None:
    reordered = GOOD.replace("  - kind: contact\n", "").replace("  - kind: gain\n", "  - kind: contact\n  - kind: gain\n")
    with pytest.raises(ConfigError, match="contact check must come first"):
        parse_sequence(reordered)
    twice = GOOD + "  - kind: offset\n"
    with pytest.raises(ConfigError, match="appears more than once"):
        parse_sequence(twice)


def test_safety_refuses_rails_beyond_the_bench_limit() -> None:
    seq = parse_sequence(GOOD, "s.yaml")
    check_bench_safety(seq, max_rail_v=10.1, compliance_a=0.02)  # V- - 0.1 V needs exactly 10.1 V
    with pytest.raises(ConfigError, match="beyond the bench's safety limit of 10 V"):
        check_bench_safety(seq, max_rail_v=10.0, compliance_a=0.02)
    with pytest.raises(ConfigError, match="above the bench's safety compliance"):
        check_bench_safety(seq, max_rail_v=12.0, compliance_a=0.01)


def test_safety_refuses_psrr_span_beyond_the_rails() -> None:
    text = GOOD + "  - kind: supply_rejection\n    spans: [8 V, 26 V]\n"
    with pytest.raises(ConfigError, match="supply span 26 V needs rails"):
        check_bench_safety(parse_sequence(text), max_rail_v=12.0, compliance_a=0.02)

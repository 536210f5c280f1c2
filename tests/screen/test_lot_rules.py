"""Lot-control rules on synthetic part streams: what fires, when, with which evidence; the
site test's false-alarm rate by simulation; the sequence section's checks."""

from __future__ import annotations

import numpy as np
import pytest

from station.config.files import ConfigError
from station.config.sequence import parse_sequence
from station.screen.lot_rules import LotControl, Rule
from tests.support.review_datalogs import ROOT

SEQUENCE = (ROOT / "sequences" / "px401_screen.yaml").read_text()


def _feed(control: LotControl, stream: list[tuple[int, bool | None, int]]) -> list:
    alarms = []
    for n, (site, passed, soft) in enumerate(stream, start=1):
        control.observe(f"D{n:05d}", site, passed, soft)
        alarms += control.take()
    return alarms


def test_consecutive_fails_on_one_site_fire_with_the_parts_as_evidence() -> None:
    rule = Rule("consecutive_fails", "consecutive_fails", "stop", count=3)
    control = LotControl((rule,), sites=2)
    # site 1 fails every part from part 5 on; site 2 fails now and then, never 3 in a row
    stream = [(1, n < 5, 1 if n < 5 else 20) for n in range(1, 12)]
    alarms = _feed(control, [(s, p, b) for s, p, b in stream])
    assert len(alarms) == 2                           # 3 fails, cleared, 3 more
    assert alarms[0].site == 1 and alarms[0].parts == ("D00005", "D00006", "D00007")
    assert alarms[0].action == "stop" and "3 failing parts in a row" in alarms[0].message
    # a pass in between resets the count; tester faults count neither way
    control = LotControl((rule,), sites=1)
    assert _feed(control, [(1, False, 5), (1, None, 90), (1, False, 5), (1, True, 1), (1, False, 5)]) == []


def test_rolling_yield_under_the_floor() -> None:
    rule = Rule("rolling_yield", "rolling_yield", "warn", window=20, floor_pct=80)
    control = LotControl((rule,), sites=4)
    stream = [(n % 4 + 1, n % 10 != 0, 1) for n in range(40)]          # 90 %: no alarm
    assert _feed(control, stream) == []
    stream = [(n % 4 + 1, n % 4 != 0, 1) for n in range(20)]           # 75 % over 20
    alarms = _feed(control, stream)
    assert len(alarms) == 1 and alarms[0].site is None
    assert "%" in alarms[0].message and all(p for p in alarms[0].parts)


def test_soft_bin_share_over_its_ceiling() -> None:
    rule = Rule("soft_bin_share", "contact", "pause", window=50, soft_bins=(20, 21), ceiling_pct=2.0)
    control = LotControl((rule,), sites=4)
    stream = [(n % 4 + 1, n != 10, 20 if n == 10 else 1) for n in range(50)]     # 1 of 50: 2 %, not over
    assert _feed(control, stream) == []
    stream = [(n % 4 + 1, n not in (3, 7), 21 if n in (3, 7) else 1) for n in range(50)]
    alarms = _feed(control, stream)
    assert len(alarms) == 1 and alarms[0].rule == "contact" and len(alarms[0].parts) >= 2


def test_site_yield_finds_a_site_far_below_the_others() -> None:
    rule = Rule("site_yield", "site_yield", "warn", window=40, alpha=0.001)
    control = LotControl((rule,), sites=4)
    rng = np.random.default_rng(1)
    stream = [(n % 4 + 1, bool(rng.random() < (0.5 if n % 4 == 2 else 0.95)), 1) for n in range(400)]
    alarms = _feed(control, stream)
    assert alarms and {a.site for a in alarms} == {3}
    assert "Fisher exact p" in alarms[0].message


def test_site_yield_false_alarm_rate_per_check_is_at_most_alpha() -> None:
    # Equal yields on every site: any alarm is a false alarm. The one-sided Fisher exact test
    # is conservative (its size is at most alpha), so the share of checks that fire stays
    # under alpha up to the simulation's own binomial error.
    alpha, window, sites = 0.02, 30, 4
    rng = np.random.default_rng(2)
    fired = checks = 0
    for _lot in range(60):
        control = LotControl((Rule("site_yield", "s", "warn", window=window, alpha=alpha),), sites=sites)
        parts = 600
        passes = rng.random(parts) < 0.9
        for n in range(parts):
            control.observe(f"P{n}", n % sites + 1, bool(passes[n]), 1)
            fired += len(control.take())
        checks += parts // window - 1         # blocks completed once the other sites have a window
    rate = fired / checks
    assert rate <= alpha + 3 * np.sqrt(alpha * (1 - alpha) / checks)


def test_sequence_section_is_read_and_checked() -> None:
    text = SEQUENCE + ("lot_control:\n  - {rule: consecutive_fails, count: 5, action: pause}\n"
                       "  - {rule: soft_bin_share, soft_bins: [20, 21], ceiling_pct: 2, action: warn}\n")
    seq = parse_sequence(text)
    assert [r.kind for r in seq.lot_control] == ["consecutive_fails", "soft_bin_share"]
    assert seq.lot_control[1].window == 200 and seq.lot_control[1].soft_bins == (20, 21)
    with pytest.raises(ConfigError, match="action"):
        parse_sequence(SEQUENCE + "lot_control:\n  - {rule: consecutive_fails, count: 5, action: explode}\n")
    with pytest.raises(ConfigError, match="unknown or missing rule"):
        parse_sequence(SEQUENCE + "lot_control:\n  - {rule: vibes, action: warn}\n")
    with pytest.raises(ConfigError, match=r"lot_control\[0\]"):
        parse_sequence(SEQUENCE + "lot_control:\n  - {rule: consecutive_fails, count: 1, action: warn}\n")
    assert parse_sequence(SEQUENCE).lot_control == ()

"""Fixture kinds per site (servo loop, difference amplifier, or both switched by relays 7xx),
and the station refusing a test whose fixture the bench lacks, before anything is powered."""

from __future__ import annotations

import math

import pytest

from station.cli.main import DEMO_LIMITS, DEMO_SEQUENCE
from station.config.bench_config import ConfigError, parse_bench_config
from station.config.plan import build_plan

HEAD = """station: t
instruments:
  supply:  {resource: "TCPIP0::127.0.0.1::5025::SOCKET", driver: scpi-dual-supply}
  force:   {resource: "TCPIP0::127.0.0.1::5026::SOCKET", driver: scpi-force-source}
  dmm:
    - {resource: "TCPIP0::127.0.0.1::5027::SOCKET", driver: scpi-dmm}
  switch:  {resource: "TCPIP0::127.0.0.1::5028::SOCKET", driver: scpi-fixture-switch}
fixture:
  sites: 2
  line_frequency: 50 Hz
  dmm_per_site: false
"""
TAIL = """safety:
  max_rail: 12 V
  current_compliance: 20 mA
"""
LOOP = "  rf: 100 kOhm\n  rs: 100 Ohm\n"


def bench(fixture: str):
    return parse_bench_config(HEAD + fixture + TAIL, "bench.yaml")


def refused(fixture: str) -> ConfigError:
    with pytest.raises(ConfigError) as caught:
        bench(fixture)
    return caught.value


def test_default_is_the_servo_loop_on_every_site():
    config = bench(LOOP)
    assert config.has_fixture("servo_loop") and not config.has_fixture("diff_amp")
    assert config.diff_amp is None


def test_diff_amp_fixture_gives_its_resolution_from_gain_and_tolerance():
    config = bench("  kind: diff_amp\n  diff_amp: {gain: 1, tolerance: 0.01 %}\n")
    assert config.has_fixture("diff_amp") and not config.has_fixture("servo_loop")
    amp = config.diff_amp
    assert amp is not None and amp.tolerance == pytest.approx(1e-4)
    # Worst-case CMRR of a difference amplifier with resistor tolerance t: (1 + G) / (4 t)
    # (from memory, a standard application-note result): G = 1, 0.01 % gives 5000, 73.98 dB
    # (arithmetic: 20 log10(2 / (4 x 1e-4))).
    assert amp.resolution_db == pytest.approx(20 * math.log10(2 / 4e-4), abs=1e-9)
    assert amp.resolution_db == pytest.approx(73.98, abs=0.005)
    # Common mode Vin/2 for a unity-gain difference amplifier with tied inputs (common
    # practice, no source); the offset reaches the output with the noise gain 1 + G = 2.
    assert amp.cm_share == pytest.approx(0.5) and amp.noise_gain == 2.0
    assert config.loop_gain == 2.0     # no servo loop: the node is the amplifier's output


def test_a_characterised_fixture_resolves_to_its_residual():
    amp = bench("  kind: diff_amp\n  diff_amp:\n    gain: 100\n    tolerance: 0.01 %\n"
                "    characterised: {slope: [3 uV/V, -2e-6], residual: 130 dB}\n").diff_amp
    assert amp is not None
    assert amp.fixture_slope(1) == pytest.approx(3e-6) and amp.fixture_slope(2) == pytest.approx(-2e-6)
    assert amp.resolution_db == pytest.approx(130.0)


def test_both_fixtures_switched_by_relays_7xx():
    config = bench(LOOP + "  kind: both\n  diff_amp: {gain: 1, tolerance: 0.01 %, relays: [701, 702]}\n")
    assert config.has_fixture("servo_loop") and config.has_fixture("diff_amp")
    assert config.switch_over_channels == (701, 702)
    assert config.loop_gain == pytest.approx(1001.0)   # the servo loop's, for its readings


@pytest.mark.parametrize(("fixture", "needle", "words"), [
    (LOOP + "  kind: both\n  diff_amp: {gain: 1, tolerance: 0.01 %}\n", "diff_amp:", "needs its switch-over relay"),
    (LOOP + "  kind: both\n  diff_amp: {gain: 1, tolerance: 0.01 %, relays: [501, 502]}\n", "relays",
     "channel 501 is not a free switch-over relay"),
    ("  kind: diff_amp\n", "kind:", "needs fixture.diff_amp"),
    ("  kind: servo_plus\n" + LOOP, "kind:", "unknown fixture kind 'servo_plus'"),
    ("  kind: [servo_loop]\n" + LOOP, "kind:", "1 entries for a 2-site fixture"),
    ("  kind: servo_loop\n", "fixture:", "a servo-loop fixture needs rf and rs"),
    ("  kind: diff_amp\n  diff_amp: {gain: 1, tolerance: 10 %}\n", "diff_amp:", "a resistor tolerance"),
    (LOOP + "  diff_amp: {gain: 1, tolerance: 0.01 %}\n", "diff_amp:", "no site has a difference amplifier"),
])
def test_bad_fixture_kinds_are_one_line_at_their_key(fixture, needle, words):
    error = refused(fixture)
    text = HEAD + fixture + TAIL
    line = next(n for n, t in enumerate(text.splitlines(), start=1) if needle in t and n > 6)
    assert words in str(error) and len(str(error).splitlines()) == 1
    assert str(error).startswith(f"bench.yaml:{line}:")


def test_a_sequence_needing_a_fixture_the_bench_lacks_is_refused_before_power(tmp_path):
    path = tmp_path / "bench.yaml"
    path.write_text(HEAD + "  kind: diff_amp\n  diff_amp: {gain: 1, tolerance: 0.01 %}\n" + TAIL)
    with pytest.raises(ConfigError) as caught:
        build_plan(path, DEMO_SEQUENCE, DEMO_LIMITS)
    text = str(caught.value)
    assert len(text.splitlines()) == 1
    assert "the offset test needs the servo_loop fixture, which site 1, 2 of the bench lacks" in text
    assert text.startswith(f"{DEMO_SEQUENCE}:") and f"{path}:12)" in text   # the fixture.kind line

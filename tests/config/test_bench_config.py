"""The bench config loader: one test per class of mistake, each pointing at its line."""

from __future__ import annotations

from pathlib import Path

import pytest

from station.config.bench_config import ConfigError, load_bench_config, parse_bench_config

ROOT = Path(__file__).resolve().parents[2]

GOOD = """\
station: test-bench
visa_library: "@py"
instruments:
  supply:  {resource: "TCPIP0::127.0.0.1::40001::SOCKET", driver: scpi-dual-supply, timeout: 5 s}
  force:   {resource: "TCPIP0::127.0.0.1::40002::SOCKET", driver: scpi-force-source}
  dmm:
    - {resource: "TCPIP0::127.0.0.1::40003::SOCKET", driver: scpi-dmm, timeout: 1500 ms, idn: "AMPSCREEN-SIM,ASM-65"}
    - {resource: "TCPIP0::127.0.0.1::40004::SOCKET", driver: scpi-dmm, timeout: 5 s}
  switch:  {resource: "TCPIP0::127.0.0.1::40005::SOCKET", driver: scpi-fixture-switch, timeout: 5 s}
  handler: {resource: "TCPIP0::127.0.0.1::40006::SOCKET", driver: scpi-handler, timeout: 5 s}
fixture:
  rf: 100 kOhm
  rs: 100 Ohm
  sites: 2
  line_frequency: 60 Hz
  dmm_per_site: true
safety:
  max_rail: 12 V
  current_compliance: 20 mA
"""


def line_of(text: str, needle: str) -> int:
    for number, line in enumerate(text.splitlines(), start=1):
        if needle in line:
            return number
    raise AssertionError(f"{needle!r} not in the text")


def error_of(text: str) -> ConfigError:
    with pytest.raises(ConfigError) as caught:
        parse_bench_config(text, "bench.yaml")
    return caught.value


def test_good_config_gives_si_floats_and_roles():
    config = parse_bench_config(GOOD, "bench.yaml")
    assert config.rf_ohm == 100e3 and config.rs_ohm == 100.0
    # 1 + Rf/Rs = 1001 for 100 kOhm / 100 Ohm: arithmetic of the servo-loop gain (MIL-STD-883
    # TM 4001, method number from memory; docs/methods.md "The servo loop").
    assert config.loop_gain == pytest.approx(1001.0)
    assert config.sites == 2 and config.line_hz == 60.0 and config.dmm_per_site
    assert config.max_rail_v == 12.0 and config.compliance_a == pytest.approx(0.020)
    assert list(config.instruments) == ["supply", "force", "dmm1", "dmm2", "switch", "handler"]
    assert config.instruments["dmm1"].timeout_s == pytest.approx(1.5)
    assert config.instruments["dmm1"].idn == "AMPSCREEN-SIM,ASM-65"
    assert config.instruments["force"].timeout_s == 5.0      # default
    assert config.visa_library == "@py"


def test_yaml_syntax_error_names_its_line():
    text = GOOD.replace("  rs: 100 Ohm", "  rs: [100 Ohm")
    error = error_of(text)
    assert "YAML syntax error" in str(error)
    # PyYAML reports a broken flow sequence at or just after the opening line.
    assert error.line is not None and line_of(text, "rs: [") <= error.line <= line_of(text, "rs: [") + 2


def test_unknown_key_names_key_and_line():
    text = GOOD.replace("  rs: 100 Ohm\n", "  rs: 100 Ohm\n  rz: 5 Ohm\n")
    error = error_of(text)
    assert error.line == line_of(text, "rz:")
    assert error.key == "fixture.rz" and "unknown key" in str(error)
    assert str(error).startswith(f"bench.yaml:{error.line}: fixture.rz: ")


def test_missing_role_is_reported():
    text = "\n".join(line for line in GOOD.splitlines() if not line.startswith("  force:"))
    error = error_of(text)
    assert error.key == "instruments" and "'force' is missing" in str(error)
    assert error.line == line_of(text, "instruments:")


def test_config_without_handler_is_fine():
    text = "\n".join(line for line in GOOD.splitlines() if not line.startswith("  handler:"))
    config = parse_bench_config(text, "bench.yaml")
    assert not config.has_handler and "handler" not in config.instruments


@pytest.mark.parametrize("old, new, key", [
    ("rf: 100 kOhm", "rf: 100 kV", "fixture.rf"),
    ("timeout: 5 s}", "timeout: 5 V}", "instruments.supply.timeout"),
    ("current_compliance: 20 mA", "current_compliance: 20 mV", "safety.current_compliance"),
    ("line_frequency: 60 Hz", "line_frequency: fast", "fixture.line_frequency"),
])
def test_bad_unit_names_the_key(old, new, key):
    text = GOOD.replace(old, new, 1)
    error = error_of(text)
    assert error.key == key
    assert error.line == line_of(text, new)


def test_bare_numbers_are_si_base_units():
    text = GOOD.replace("rf: 100 kOhm", "rf: 100000").replace("current_compliance: 20 mA",
                                                              "current_compliance: 0.02")
    config = parse_bench_config(text)
    assert config.rf_ohm == 100000.0 and config.compliance_a == 0.02


def test_bad_resource_string():
    text = GOOD.replace("TCPIP0::127.0.0.1::40005::SOCKET", "TCPIP0::127.0.0.1::SOCKET")
    error = error_of(text)
    assert error.key == "instruments.switch.resource"
    assert "VISA resource" in str(error) and error.line == line_of(text, "switch:")


@pytest.mark.parametrize("sites, per_site, ok", [
    (2, "true", True), (3, "true", False), (2, "false", False), (4, "true", False),
])
def test_dmm_count_must_fit_sites(sites, per_site, ok):
    text = GOOD.replace("sites: 2", f"sites: {sites}").replace("dmm_per_site: true",
                                                                f"dmm_per_site: {per_site}")
    if ok:
        assert parse_bench_config(text).dmm_per_site
        return
    error = error_of(text)
    assert error.key == "instruments.dmm" and "DMMs" in str(error)
    assert error.line == line_of(text, "  dmm:")


def test_one_dmm_with_scanner_is_inferred_without_dmm_per_site():
    lines = [line for line in GOOD.splitlines() if "40004" not in line and "dmm_per_site" not in line]
    config = parse_bench_config("\n".join(lines))
    assert config.dmm_roles == ["dmm1"] and not config.dmm_per_site


@pytest.mark.parametrize("old, new, key", [
    ("sites: 2", "sites: 5", "fixture.sites"),
    ("sites: 2", "sites: 0", "fixture.sites"),
    ("max_rail: 12 V", "max_rail: 0 V", "safety.max_rail"),
    ("max_rail: 12 V", "max_rail: 31 V", "safety.max_rail"),
    ("line_frequency: 60 Hz", "line_frequency: 400 Hz", "fixture.line_frequency"),
    ("driver: scpi-fixture-switch", "driver: scpi-relay", "instruments.switch.driver"),
    ("driver: scpi-fixture-switch", "driver: scpi-dmm, idn: x", "instruments.switch.driver"),
])
def test_values_out_of_bounds(old, new, key):
    text = GOOD.replace(old, new, 1)
    error = error_of(text)
    assert error.key == key and error.line == line_of(text, new)


def test_unknown_driver_lists_the_known_ones():
    error = error_of(GOOD.replace("driver: scpi-fixture-switch", "driver: scpi-relay"))
    assert "scpi-fixture-switch" in str(error) and "unknown driver" in str(error)


def test_example_bench_file_loads():
    config = load_bench_config(ROOT / "benches" / "example-bench.yaml")
    assert config.source == ROOT / "benches" / "example-bench.yaml"
    assert set(config.instruments) >= {"supply", "force", "dmm1", "switch"}
    assert config.max_rail_v > 0 and config.loop_gain > 1


def test_missing_file_is_a_config_error(tmp_path):
    with pytest.raises(ConfigError, match="file not found"):
        load_bench_config(tmp_path / "nope.yaml")

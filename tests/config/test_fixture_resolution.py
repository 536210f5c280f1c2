"""Fixture resolution: limits the fixture cannot resolve are refused, at `limits check --bench`
and before every lot."""

from __future__ import annotations

import math

import numpy as np
import pytest
from click.testing import CliRunner

from station.cli.main import DEMO_LIMITS, DEMO_SEQUENCE, main
from station.config.files import ConfigError
from station.config.plan import build_plan
from station.config.resolution import slope_noise

BENCH = """station: t
instruments:
  supply:  {{resource: "TCPIP0::127.0.0.1::5025::SOCKET", driver: scpi-dual-supply}}
  force:   {{resource: "TCPIP0::127.0.0.1::5026::SOCKET", driver: scpi-force-source}}
  dmm:
    - {{resource: "TCPIP0::127.0.0.1::5027::SOCKET", driver: scpi-dmm}}
  switch:  {{resource: "TCPIP0::127.0.0.1::5028::SOCKET", driver: scpi-fixture-switch}}
fixture:
  rf: 100 kOhm
  rs: 100 Ohm
  sites: 1
  line_frequency: 50 Hz
  bias: {{rb: 100 MOhm, plus: [501], minus: [601]}}   # the demo sequence's bias_current test
{resolution}
safety:
  max_rail: 12 V
  current_compliance: 20 mA
"""


def _bench(tmp_path, resolution: str):
    path = tmp_path / "bench.yaml"
    path.write_text(BENCH.format(resolution=resolution))
    return path


def test_slope_noise_is_the_least_squares_standard_error():
    # numpy's polyfit covariance (cov="unscaled" is (X^T X)^-1) times sigma^2 is the variance
    # of the fitted slope: the textbook OLS result.
    xs = [-5.1, -4.0, -2.0, 0.0, 2.0, 3.0]
    _, cov = np.polyfit(xs, np.zeros(len(xs)) + np.arange(len(xs)) * 1e-9, 1, cov="unscaled")
    assert slope_noise(2e-6, xs) == pytest.approx(2e-6 * math.sqrt(cov[0, 0]))


def test_a_cmrr_limit_beyond_the_fixture_is_refused_in_one_line(tmp_path):
    bench = _bench(tmp_path, "  resolution: {dmm_noise: 1 uV, nplc: 1, cmrr_limit: 115 dB}")
    result = CliRunner().invoke(main, ["limits", "check", str(DEMO_LIMITS), "--bench", str(bench)])
    assert result.exit_code == 2
    lines = [line for line in result.output.splitlines() if "beyond the fixture's own CMRR" in line]
    assert len(lines) == 1       # grade A's 120 dB; grade B's 110 dB is within 115 dB
    assert "px401.yaml:34:" in lines[0] and "grade A cmrr low limit 120 dB" in lines[0]
    assert "lower the limit to 115 dB" in lines[0]
    # The lot is refused before anything is powered, with the same line.
    with pytest.raises(ConfigError, match="beyond the fixture's own CMRR"):
        build_plan(bench, DEMO_SEQUENCE, DEMO_LIMITS)


def test_a_limit_below_the_slope_noise_is_refused_naming_what_the_fixture_resolves(tmp_path):
    # 2 mV of DMM noise at the node (2 uV input-referred at G = 1001): PSRR's two spans 4 V
    # apart, 4 readings each, resolve 3 x 2e-6/2 x sqrt(2)/4 = 1.06e-6 V/V (119.5 dB) only.
    bench = _bench(tmp_path, "  resolution: {dmm_noise: 2 mV, nplc: 1}")
    result = CliRunner().invoke(main, ["limits", "check", str(DEMO_LIMITS), "--bench", str(bench)])
    assert result.exit_code == 2
    psrr = next(line for line in result.output.splitlines() if "grade A psrr" in line)
    assert "1.06e-06 V/V, 119.5 dB" in psrr


def test_a_resolving_fixture_passes_and_no_resolution_is_said(tmp_path):
    fine = _bench(tmp_path, "  resolution: {dmm_noise: 1 uV, nplc: 1, cmrr_limit: 140 dB}")
    result = CliRunner().invoke(main, ["limits", "check", str(DEMO_LIMITS), "--bench", str(fine)])
    assert result.exit_code == 0 and "every limit is within" in result.output
    build_plan(fine, DEMO_SEQUENCE, DEMO_LIMITS)
    silent = _bench(tmp_path, "")
    result = CliRunner().invoke(main, ["limits", "check", str(DEMO_LIMITS), "--bench", str(silent)])
    assert result.exit_code == 0 and "not checked" in result.output

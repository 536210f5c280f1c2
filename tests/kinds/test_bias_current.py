"""The bias_current kind: the current math, its checks before anything is powered, and a dry
run whose Ib+, Ib- and Ios match the simulator's truth within the noise of Rb."""

from __future__ import annotations

import math
import textwrap
from pathlib import Path

import pandas as pd
import pytest
from click.testing import CliRunner
from scipy import constants

from station.cli.main import main
from station.config.bench_config import parse_bench_config
from station.config.files import ConfigError
from station.config.plan import build_plan
from station.config.sequence import load_sequence
from station.demo import DEMO_LIMITS, DEMO_SEQUENCE, EXAMPLE_BENCH
from station.judge.measure import bias_figures

RB = 100e6          # the simulated fixture's Rb (sim_instruments/model.py DEFAULT_RB_OHM)
TEMPERATURE_K = 300.0
LINE_HZ = 50.0


def _figures(base: float, plus: float, minus: float, both: float, rb: float) -> dict[str, float]:
    return {f.param: f.value for f in bias_figures(base, plus, minus, both, rb)}


def test_100_pA_through_10_megohm_reads_1_mV():
    # common practice, no source: 100 pA x 10 MOhm = 1 mV input-referred
    got = _figures(5e-6, 5e-6 + 1e-3, 5e-6, 5e-6 + 1e-3, 10e6)
    assert got["ib_plus"] == pytest.approx(100e-12, rel=1e-9)
    assert got["ib_minus"] == pytest.approx(0.0, abs=1e-18)


def test_currents_mean_and_difference():
    # Ib+ = 3 pA, Ib- = 2 pA through 100 MOhm: +0.3 mV and -0.2 mV on the reading
    base = -20e-6
    got = _figures(base, base + 0.3e-3, base - 0.2e-3, base + 0.1e-3, RB)
    assert got["ib_plus"] == pytest.approx(3e-12)
    assert got["ib_minus"] == pytest.approx(2e-12)
    assert got["ib"] == pytest.approx(2.5e-12)                     # (Ib+ + Ib-) / 2
    assert got["ios"] == pytest.approx(1e-12)                      # Ib+ - Ib-
    assert got["ios_both"] == pytest.approx(got["ios"])            # both Rb in: Ios x Rb


def test_a_sequence_with_bias_current_needs_bias_resistors(tmp_path: Path):
    text = EXAMPLE_BENCH.read_text(encoding="utf-8")
    start = text.index("  bias:")
    end = text.index("\nsafety:") + 1
    bench = tmp_path / "bench.yaml"
    bench.write_text(text[:start] + text[end:], encoding="utf-8")
    with pytest.raises(ConfigError) as caught:
        build_plan(bench, DEMO_SEQUENCE, DEMO_LIMITS)
    message = str(caught.value)
    line = load_sequence(DEMO_SEQUENCE).steps("bias_current")[0].line
    assert message.startswith(f"{DEMO_SEQUENCE}:{line}: tests[")
    assert "fixture.bias" in message and "\n" not in message


BENCH = """\
instruments:
  supply: {{resource: "TCPIP0::127.0.0.1::5025::SOCKET", driver: scpi-dual-supply}}
  force: {{resource: "TCPIP0::127.0.0.1::5026::SOCKET", driver: scpi-force-source}}
  dmm: [{{resource: "TCPIP0::127.0.0.1::5027::SOCKET", driver: scpi-dmm}}]
  switch: {{resource: "TCPIP0::127.0.0.1::5028::SOCKET", driver: scpi-fixture-switch}}
fixture:
  rf: 100 kOhm
  rs: 100 Ohm
  sites: 2
  line_frequency: 50 Hz
  bias:
{bias}
safety: {{max_rail: 12 V, current_compliance: 20 mA}}
"""


def _bench(bias: str):
    return parse_bench_config(BENCH.format(bias=textwrap.indent(textwrap.dedent(bias), "    ")), "b.yaml")


def test_bias_section_per_site():
    config = _bench("rb: [100 MOhm, 1 GOhm]\nplus: [501, 502]\nminus: [601, 602]\n")
    assert config.bias is not None
    assert config.bias.rb_ohm == (100e6, 1e9)
    assert config.bias.channels(2, True, True) == {502, 602}
    assert _bench("rb: 10 MOhm\nplus: [501, 502]\nminus: [601, 602]\n").bias.rb_ohm == (10e6, 10e6)  # type: ignore[union-attr]


@pytest.mark.parametrize(("bias", "where", "what"), [
    ("rb: [100 MOhm]\nplus: [501, 502]\nminus: [601, 602]\n", "fixture.bias.rb", "1 entries for a 2-site"),
    ("rb: 100 MOhm\nplus: [501, 101]\nminus: [601, 602]\n", "fixture.bias.plus[1]", "not a bias relay"),
    ("rb: 100 MOhm\nplus: [501, 502]\nminus: [601, 501]\n", "fixture.bias.minus[1]", "listed twice"),
    ("rb: 100 pOhm\nplus: [501, 502]\nminus: [601, 602]\n", "fixture.bias.rb", "outside"),
])
def test_bad_bias_sections_are_one_line_errors(bias: str, where: str, what: str):
    with pytest.raises(ConfigError) as caught:
        _bench(bias)
    message = str(caught.value)
    assert message.startswith("b.yaml:") and where in message and what in message
    assert "\n" not in message


# --- a dry run against the truth -------------------------------------------------------------

@pytest.fixture(scope="module")
def dry_run(tmp_path_factory) -> tuple[pd.DataFrame, pd.DataFrame]:
    out = tmp_path_factory.mktemp("bias") / "lot"
    result = CliRunner().invoke(main, ["dry-run", "--parts", "8", "--sites", "4", "--seed", "3",
                                       "--speed", "20", "--out", str(out), "--lot", "BIAS"])
    assert result.exit_code == 0, result.output
    results = pd.read_csv(out / "results.csv")
    figures = results.pivot_table(index="PART_ID", columns="PARAM", values="RESULT", aggfunc="first")
    truth = pd.read_csv(out / "sim_truth.csv").set_index("PART_ID")
    contacted = figures.index[figures["ib"].notna()]
    return figures.loc[contacted], truth.loc[contacted]


def _reading_sigma(truth_row: pd.Series, rb_in: float) -> float:
    """RMS input-referred noise of one logged reading (the mean of `average` samples of
    NPLC/line seconds): white density e averaged over T is e / sqrt(2 T) (common practice, no
    source), the density being the part's own and the Johnson noise sqrt(4kTR) of the Rb in
    circuit (k from scipy.constants); plus the part's 1/f floor per sample."""
    step = load_sequence(DEMO_SEQUENCE).steps("bias_current")[0]
    t = step.nplc / LINE_HZ
    density_sq = truth_row["NOISE_V_RTHZ"] ** 2 + 4 * constants.k * TEMPERATURE_K * rb_in
    per_sample = math.sqrt(density_sq / (2 * t) + truth_row["FLICKER_V"] ** 2)
    return per_sample / math.sqrt(step.average)


BOUND_SIGMAS = 6.0  # noise (5 sigma) plus what the settling rule may leave (its 2 sigma stop)


def test_dry_run_currents_match_the_truth_within_rb_noise(dry_run):
    figures, truth = dry_run
    assert len(figures) >= 6
    for part_id, row in truth.iterrows():
        base, one = _reading_sigma(row, 0.0), _reading_sigma(row, RB)
        sigma_ib = math.hypot(base, one) / RB
        got = figures.loc[part_id]
        assert got["ib_plus"] == pytest.approx(row["IB_PLUS_A"], abs=BOUND_SIGMAS * sigma_ib), part_id
        assert got["ib_minus"] == pytest.approx(row["IB_MINUS_A"], abs=BOUND_SIGMAS * sigma_ib), part_id
        # Ios from the + and - readings shares the base reading: sqrt(2) one-Rb noise
        sigma_ios = math.hypot(one, one) / RB
        assert got["ios"] == pytest.approx(row["IOS_A"], abs=BOUND_SIGMAS * sigma_ios), part_id
        # the noise bound is pA-sized: a check that could not fail would be far wider
        assert sigma_ib < 0.1e-12


def test_ios_from_both_rb_in_agrees_with_ib_plus_minus_ib_minus(dry_run):
    figures, truth = dry_run
    for part_id, row in truth.iterrows():
        one, two = _reading_sigma(row, RB), _reading_sigma(row, 2 * RB)
        # both estimates from independent readings but the base: + and - readings vs the both one
        sigma = math.sqrt(2 * one ** 2 + two ** 2) / RB
        got = figures.loc[part_id]
        assert got["ios_both"] == pytest.approx(got["ios"], abs=BOUND_SIGMAS * sigma), part_id


def test_one_dmm_behind_the_scanner_predicts_each_site_in_turn(tmp_path: Path):
    # The predicted wait with one DMM: each site probed and read in turn (the others settling).
    from benchmarks.lot_run import run_lot
    from sim_instruments.bench import SimSettings

    assert load_sequence(DEMO_SEQUENCE).steps("bias_current")[0].predict is not None
    run = run_lot(SimSettings(seed=3, sites=4, parts=8, speed=20, dmm_per_site=False), DEMO_SEQUENCE,
                  DEMO_LIMITS, tmp_path / "lot")
    results = pd.read_csv(run.folder / "results.csv")
    figures = results.pivot_table(index="PART_ID", columns="PARAM", values="RESULT", aggfunc="first")
    truth = pd.read_csv(run.folder / "sim_truth.csv").set_index("PART_ID")
    contacted = figures.index[figures["ib"].notna()]
    assert len(contacted) >= 6
    for part_id in contacted:
        row = truth.loc[part_id]
        sigma_ib = math.hypot(_reading_sigma(row, 0.0), _reading_sigma(row, RB)) / RB
        got = figures.loc[part_id]
        assert got["ib_plus"] == pytest.approx(row["IB_PLUS_A"], abs=BOUND_SIGMAS * sigma_ib), part_id
        assert got["ib_minus"] == pytest.approx(row["IB_MINUS_A"], abs=BOUND_SIGMAS * sigma_ib), part_id

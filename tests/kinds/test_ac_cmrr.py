"""The ac_cmrr kind: a single pole's arithmetic, the -3 dB rule, a dry run of the demo
difference-amplifier bench whose CMRR(f) and -3 dB frequency match the simulator's truth, the
refusals before power, and the generator off on the way out."""

from __future__ import annotations

import json
import math
from pathlib import Path

import pandas as pd
import pytest
from click.testing import CliRunner
from scipy.optimize import brentq

from sim_instruments.dmm import AC_INPUT_BANDWIDTH_HZ, AC_NOISE_PER_RANGE_RTHZ, GENERATOR_JITTER
from sim_instruments.model import DIFF_AMP_R_OHM, part_noise_rti
from sim_instruments.population import WIDTH_10_90_PER_SCALE, PartTruth
from station.cli.main import main
from station.config.files import ConfigError
from station.config.plan import build_plan
from station.demo import AC_LIMITS, AC_SEQUENCE, DIFFAMP_BENCH
from station.judge.ac_rejection import frequency_label, minus_3db_frequency, single_pole_db
from station.kinds.ac_cmrr import AcCmrr, AcSweep

POINTS = (20.0, 50.0, 100.0, 200.0, 500.0, 1e3, 2e3, 5e3, 1e4)   # the demo sequence's
GAIN, AMPLITUDE, APERTURE, RANGE, AVERAGE = 100.0, 2.0, 0.5, 0.1, 4


def test_single_pole_is_minus_3_01_dB_at_the_corner_and_minus_20_04_a_decade_above():
    # Arithmetic: 20 log10(1 / sqrt(1 + (f/fc)^2)) = -3.0103 dB at f = fc, -20.0432 dB at 10 fc.
    assert single_pole_db(470.0, 470.0) == pytest.approx(-3.0103, abs=1e-4)
    assert single_pole_db(4700.0, 470.0) == pytest.approx(-20.0432, abs=1e-4)
    assert single_pole_db(1.0, 470.0) == pytest.approx(0.0, abs=1e-4)


def test_minus_3db_frequency_interpolates_in_log_f():
    # A point exactly 3 dB down is found exactly; between two points, linear in dB against log10 f.
    assert minus_3db_frequency([10.0, 100.0, 1000.0], [120.0, 117.0, 100.0]) == pytest.approx(100.0)
    assert minus_3db_frequency([10.0, 100.0], [120.0, 114.0]) == pytest.approx(10 ** 1.5)
    assert math.isnan(minus_3db_frequency([10.0, 100.0], [120.0, 118.0]))     # never fell 3 dB
    # On a single pole sampled 1-2-5 per decade the rule lands within 10 % of the corner's exact
    # -3 dB point (scipy's root finder on the same curve; the rest is the interpolation's error).
    for fc in (100.0, 170.0, 300.0, 560.0, 1000.0):
        curve = [single_pole_db(f, fc) for f in POINTS]
        exact = brentq(lambda f, fc=fc, ref=curve[0]: single_pole_db(f, fc) - ref + 3.0, POINTS[0], POINTS[-1])
        assert minus_3db_frequency(POINTS, curve) == pytest.approx(exact, rel=0.10)


def test_labels_are_the_limit_table_regions():
    assert [frequency_label(f) for f in (20.0, 500.0, 1e3, 2.5e3, 1e4)] == ["20 Hz", "500 Hz", "1 kHz", "2.5 kHz",
                                                                            "10 kHz"]


def _dry_run(tmp: Path, parts: int = 4) -> tuple[pd.DataFrame, pd.DataFrame, dict]:
    out = tmp / "lot"
    result = CliRunner().invoke(main, ["dry-run", "--bench", str(DIFFAMP_BENCH), "--sequence", str(AC_SEQUENCE),
                                       "--limits", str(AC_LIMITS), "--parts", str(parts), "--seed", "3",
                                       "--speed", "50", "--out", str(out), "--lot", "ACDEMO"])
    assert result.exit_code == 0, result.output
    assert "generator: output off: ok" in result.output
    return (pd.read_csv(out / "results.csv"), pd.read_csv(out / "sim_truth.csv").set_index("PART_ID"),
            json.loads((out / "lot.json").read_text()))


def _true_slope(row: pd.Series, frequency_hz: float, mismatch: float) -> complex:
    """The model's slope at mid common mode: the pairs' logistic blend at VCM 0, its single
    pole, plus the site's resistor mismatch (the truth of sim_instruments, restated)."""
    scale = row["CROSSOVER_WIDTH_V"] / WIDTH_10_90_PER_SCALE
    weight = 1.0 / (1.0 + math.exp(row["CROSSOVER_VCM_V"] / scale))
    dc = (1 - weight) * row["CMRR_LOW_VV"] + weight * row["CMRR_HIGH_VV"]
    return dc * complex(1.0, frequency_hz / row["CMRR_CORNER_HZ"]) + mismatch


def _exact_f3(row: pd.Series, m: float) -> float:
    """Where the true rejection has fallen 3 dB below its value at the lowest point (scipy's root finder)."""
    ref = abs(_true_slope(row, POINTS[0], m))
    return brentq(lambda f: 20 * math.log10(abs(_true_slope(row, f, m)) / ref) - 3.0, POINTS[0], POINTS[-1])


def _vout_bound(row: pd.Series, vout: float) -> float:
    """4 sigma of the mean of AVERAGE AC readings: the part's and resistors' noise over the
    aperture at the noise gain, the meter's own, the generator's jitter (the model's figures)."""
    part = PartTruth("x", 0, "none", False, 0, 0, 0, 0, 1.3, 0.2, 1e6, 0, 0, row["NOISE_V_RTHZ"],
                     row["FLICKER_V"], 0.0025, 0.03, 0, math.inf)
    node = (1 + GAIN) * part_noise_rti(part, APERTURE, GAIN * DIFF_AMP_R_OHM, DIFF_AMP_R_OHM)
    own = AC_NOISE_PER_RANGE_RTHZ * RANGE / math.sqrt(2 * APERTURE)
    return 4.0 * (math.hypot(node, own) + GENERATOR_JITTER * vout) / math.sqrt(AVERAGE)


def test_dry_run_cmrr_per_point_and_minus_3db_match_the_truth(tmp_path: Path):
    results, truth, lot = _dry_run(tmp_path)
    mismatch = lot["dry_run"]["fixture"]["cm_slope"]
    cmrr = results[results["PARAM"] == "cmrr_ac"]
    assert set(cmrr["REGION"]) == {frequency_label(f) for f in POINTS}
    checked = corners = 0
    for part_id, rows in cmrr.groupby("PART_ID"):
        row = truth.loc[part_id]
        m = mismatch[int(rows["SITE_NUM"].iloc[0]) - 1]
        got = dict(zip(rows["REGION"], rows["RESULT"], strict=True))
        good = True
        true_db, tolerances = [], []
        for f in POINTS:
            slope = abs(_true_slope(row, f, m))
            vout = GAIN * AMPLITUDE * slope / math.hypot(1.0, f / AC_INPUT_BANDWIDTH_HZ)   # the meter's input pole
            bound = _vout_bound(row, vout)
            if bound > 0.5 * vout:       # at the noise floor: nothing to compare within a dB bound
                good = False
                continue
            expected = -20 * math.log10(slope)
            tolerance = -20 * math.log10(1 - bound / vout) + 20 * math.log10(math.hypot(1.0, f / AC_INPUT_BANDWIDTH_HZ))
            assert got[frequency_label(f)] == pytest.approx(expected, abs=tolerance), (part_id, f)
            true_db.append(expected)
            tolerances.append(tolerance)
            checked += 1
        if good:
            # The -3 dB frequency: the rule on the true curve, bracketed by the rule on the curve
            # moved to the edges of its noise bounds (reference up and the rest down gives the
            # earliest fall, the opposite the latest); the rule's own error against the exact
            # corner is the 10 % of test_minus_3db_frequency_interpolates_in_log_f.
            earliest = minus_3db_frequency(POINTS, [true_db[0] + tolerances[0],
                                                    *(d - t for d, t in zip(true_db[1:], tolerances[1:], strict=True))])
            latest = minus_3db_frequency(POINTS, [true_db[0] - tolerances[0],
                                                  *(d + t for d, t in zip(true_db[1:], tolerances[1:], strict=True))])
            f3 = results[(results["PART_ID"] == part_id) & (results["PARAM"] == "cmrr_ac_f3db")]["RESULT"].iloc[0]
            assert earliest <= f3 <= latest, (part_id, earliest, f3, latest)
            assert minus_3db_frequency(POINTS, true_db) == pytest.approx(_exact_f3(row, m), rel=0.10)
            corners += 1
    assert checked >= 20 and corners >= 2


def _plan(tmp: Path, sequence: str | None = None, limits: str | None = None, bench: str | None = None):
    paths = []
    for name, text, default in (("bench.yaml", bench, DIFFAMP_BENCH), ("seq.yaml", sequence, AC_SEQUENCE),
                                ("limits.yaml", limits, AC_LIMITS)):
        path = tmp / name
        path.write_text(text if text is not None else default.read_text(encoding="utf-8"))
        paths.append(path)
    return build_plan(*paths)


def _refusal(tmp: Path, **edits: tuple[str, str]) -> str:
    texts = {}
    for what, (old, new) in edits.items():
        source = {"sequence": AC_SEQUENCE, "limits": AC_LIMITS, "bench": DIFFAMP_BENCH}[what].read_text(encoding="utf-8")
        assert old in source
        texts[what] = source.replace(old, new, 1)
    with pytest.raises(ConfigError) as caught:
        _plan(tmp, **texts)
    text = str(caught.value)
    assert "\n" not in text
    return text


def test_the_demo_plan_builds(tmp_path: Path):
    plan = _plan(tmp_path)
    assert [t.param for t in plan.tests].count("cmrr_ac") == len(POINTS)


@pytest.mark.parametrize(("what", "old", "new", "words"), [
    ("sequence", "[20 Hz,", "[1 Hz, 20 Hz,", "frequency point 1 Hz is outside what the DMM's AC function reads"),
    ("sequence", "10 kHz]", "10 kHz, 200 kHz]", "frequency point 200 kHz is outside"),
    ("sequence", "amplitude: 2 V ", "amplitude: 3.6 V ", "peaks at 5.09 V on the tied inputs, beyond 5 V"),
    ("sequence", "span: 10 V", "span: 5 V", "swings the part's common mode by +-2.8 V, beyond the rails (+-2.5 V"),
    ("limits", "region: 1 kHz, low: 115 dB", "region: 1 kHz, low: 150 dB",
     "grade A cmrr_ac 1 kHz limit 150 dB is beyond what the difference amplifier resolves (148.0 dB"),
    ("limits", "region: 1 kHz, low: 115 dB", "region: 3 kHz, low: 115 dB", "the sequence sweeps no such frequency"),
    ("limits", "low: 300 Hz", "low: 20 kHz", "-3 dB frequency limit 20 kHz is outside the sweep"),
    ("bench", "  generator: {", "  # generator: {", "needs a function generator"),
])
def test_refused_before_power(tmp_path: Path, what: str, old: str, new: str, words: str):
    assert words in _refusal(tmp_path, **{what: (old, new)})


class _Screen:
    """A bench that fails its AC reading mid-sweep."""

    def __init__(self, bench_config) -> None:
        self.bench_config = bench_config
        self.calls: list[tuple] = []
        self.context = type("C", (), {"span_v": 10.0})()

    def __getattr__(self, name: str):
        return lambda *args: self.calls.append((name, *args))

    def read_ac(self, *args):
        raise TimeoutError("the DMM did not answer")


def test_generator_off_and_servo_loop_on_every_way_out(tmp_path: Path):
    plan = _plan(tmp_path)
    step = plan.sequence.steps("ac_cmrr")[0]
    assert step.ac == AcSweep(POINTS, AMPLITUDE, APERTURE, RANGE)
    screen = _Screen(plan.bench)
    with pytest.raises(TimeoutError):
        AcCmrr().run(step, plan.step_tests(step), screen, [])   # type: ignore[arg-type]
    assert ("generator_output", True) in screen.calls
    assert screen.calls[-2:] == [("generator_output", False), ("use_fixture", [], "servo_loop")]

"""The main job end to end: a dry run through pyvisa-py sockets, scored against the simulator's truth."""

from __future__ import annotations

import json
import math

import numpy as np
import pandas as pd
import pytest
from click.testing import CliRunner

from station.cli.main import DEMO_LIMITS, main
from station.config.limit_tables import load_limit_table

SEED = 7
PARTS = 40


# The same dry run over raw SCPI sockets and over HiSLIP: the transport changes nothing measured.
@pytest.fixture(scope="module", params=["socket", "hislip"])
def datalog(tmp_path_factory, request):
    out = tmp_path_factory.mktemp("dry") / "lot"
    result = CliRunner().invoke(main, ["dry-run", "--parts", str(PARTS), "--sites", "4", "--seed", str(SEED),
                                       "--speed", "10", "--out", str(out), "--lot", "T-1",
                                       "--transport", request.param])
    assert result.exit_code == 0, result.output
    return out


def _load(folder):
    results = pd.read_csv(folder / "results.csv")
    parts = pd.read_csv(folder / "parts.csv")
    truth = pd.read_csv(folder / "sim_truth.csv")
    return results, parts, truth


def test_datalog_has_every_part_once_with_header_and_hashes(datalog) -> None:
    results, parts, truth = _load(datalog)
    assert len(parts) == PARTS and parts["PART_ID"].is_unique
    assert set(parts["PART_ID"]) == set(truth["PART_ID"])
    header = json.loads((datalog / "lot.json").read_text())
    assert header["complete"] is True and header["parts_tested"] == PARTS
    assert sum(b["count"] for b in header["hard_bins"].values()) == PARTS
    assert set(header["instruments"]) >= {"supply", "force", "dmm1", "dmm4", "switch", "handler"}
    for key in ("sequence", "limits", "bench"):
        assert len(header[key]["sha256"]) == 64
    # Every raw common-mode point is logged, so regions can be re-analysed offline.
    good = parts[parts["PASS"] == 1]["PART_ID"]
    raw = results[(results["PARAM"] == "vos_cm") & results["PART_ID"].isin(good)]
    assert raw.groupby("PART_ID").size().eq(15).all()


def test_binning_is_consistent_with_the_rows(datalog) -> None:
    results, parts, _ = _load(datalog)
    table = load_limit_table(DEMO_LIMITS)
    limited = results[results["PASS"].notna()]
    for _, part in parts.iterrows():
        rows = limited[limited["PART_ID"] == part["PART_ID"]]
        if part["PASS"] == 1:
            assert (rows["PASS"] == 1).all(), part["PART_ID"]
            assert table.hard_bins[part["HARD_BIN"]].passing
            assert (rows["GRADE"] == part["GRADE"]).all()
        elif part["HARD_BIN"] == table.fail_hard_bin:
            failing = rows[rows["PASS"] == 0]
            assert not failing.empty, part["PART_ID"]
            first = failing[failing["TEST_NUM"] == part["FAIL_TEST"]]
            assert len(first) == 1
            limit = next(lim for lim in table.loosest.limits
                         if lim.param == first["PARAM"].iloc[0]
                         and (lim.region or "") == (first["REGION"].fillna("").iloc[0]))
            assert limit.soft_bin == part["SOFT_BIN"]


def test_measured_figures_agree_with_the_truth(datalog) -> None:
    results, parts, truth = _load(datalog)
    clean = truth[truth["DEFECT"] == "none"].set_index("PART_ID")
    figures = results.pivot_table(index="PART_ID", columns=["PARAM", "REGION"], values="RESULT",
                                  aggfunc="first", dropna=False)
    vos = results[results["PARAM"] == "vos"].set_index("PART_ID")["RESULT"]
    common = clean.index.intersection(vos.index)
    assert len(common) >= PARTS * 0.8
    # Tolerances from the sequence's noise: about 0.1 uV RTI per 1-NPLC reading and a settle
    # criterion of 0.2 uV (see sequences/px401_screen.yaml); Vos averages 4 readings.
    np.testing.assert_allclose(vos[common], clean.loc[common, "VOS_LOW_V"], atol=0.5e-6)
    slope = results[results["PARAM"] == "cmrr_slope"].pivot_table(index="PART_ID", columns="REGION",
                                                                   values="RESULT", aggfunc="first")
    # Low region: 6 points over 8 V, least-squares slope error well under 0.1 uV/V (the slope's
    # standard error is sigma / sqrt(sum (x - mean)^2): common practice, no source).
    np.testing.assert_allclose(slope.loc[common, "low"], clean.loc[common, "CMRR_LOW_VV"], atol=0.1e-6)
    # High region: 4 points over 1 V, so ~8x the leverage error of the low region.
    np.testing.assert_allclose(slope.loc[common, "high"], clean.loc[common, "CMRR_HIGH_VV"], atol=0.6e-6)
    # AOL on its slope dVos/dVout = 1/AOL, where the noise is Gaussian (in dB it is skewed: at
    # 133 dB a 1.3 uV input step over ~50 nV of noise is 0.3 dB per sigma and 1 dB is reached
    # by chance). The slope's error is sqrt(2) x 0.05 uV (4 averaged readings of ~0.1 uV RTI)
    # over the 6 V step, 1.2e-8 V/V; 6e-8 is five of those (common practice, no source).
    aol_slope = results[results["PARAM"] == "aol_slope"].set_index("PART_ID")["RESULT"].abs()
    np.testing.assert_allclose(aol_slope[common], 10 ** (-clean.loc[common, "AOL_DB"] / 20), atol=6e-8)
    assert figures is not None


def test_dry_run_dB_figures_follow_the_published_formula(datalog) -> None:
    results, _, _ = _load(datalog)
    pairs = results[results["PARAM"].isin(["cmrr", "cmrr_slope"])].pivot_table(
        index=["PART_ID", "REGION"], columns="PARAM", values="RESULT", aggfunc="first").dropna()
    finite = pairs[np.isfinite(pairs["cmrr_slope"])]
    # CMRR_dB = -20 log10 |dVos/dVcm|, the published definition: MIL-STD-883 TM 4003 (from
    # memory; docs/methods.md "cm_sweep"). numpy computes the reference.
    np.testing.assert_allclose(finite["cmrr"], -20 * np.log10(finite["cmrr_slope"].abs()), rtol=1e-12)
    assert math.isfinite(finite["cmrr"].median())

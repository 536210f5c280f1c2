"""Dry run of a seeded population with injected in-spec outliers: dynamic PAT at 6 sigma
catches them, and flags no more normal parts than the expected share."""

from __future__ import annotations

import json
from pathlib import Path

import numpy as np
import pandas as pd
from click.testing import CliRunner
from scipy import stats

from station.cli.main import main
from tests.screen.pat_support import pat_table_text

PARTS, BASELINE = 240, 30


def expected_false_share(n: int, k: float = 6.0, trials: int = 4000) -> float:
    """Share of a normal population outside median +- k IQR/1.35 of an n-part baseline, averaged
    over baselines: Monte Carlo of the baseline (numpy) with the exact normal tail (scipy.stats.norm).
    With the true centre and sigma it would be 2 x norm.sf(6) = 2e-9; the baseline's own
    sampling error makes it about 1e-4 at n = 30."""
    x = np.random.default_rng(0).normal(size=(trials, n))
    med = np.median(x, axis=1)
    q1, q3 = np.percentile(x, [25, 75], axis=1)
    s = (q3 - q1) / 1.35
    return float(np.mean(stats.norm.sf(med + k * s) + stats.norm.cdf(med - k * s)))


def test_dynamic_pat_catches_injected_outliers_and_few_normal_parts(tmp_path: Path) -> None:
    limits = tmp_path / "pat.yaml"
    limits.write_text(pat_table_text(f"  dynamic: {{baseline: {BASELINE}, sigma: 6, soft_bin: 49}}\n"))
    out = tmp_path / "lot"
    result = CliRunner().invoke(main, ["dry-run", "--parts", str(PARTS), "--seed", "5", "--speed", "1000",
                                       "--limits", str(limits), "--inject-outliers", "0.03", "--out", str(out),
                                       "--lot", "PAT-1"])
    assert result.exit_code == 0, result.output
    lot = json.loads((out / "lot.json").read_text())
    truth = pd.read_csv(out / "sim_truth.csv", dtype={"PART_ID": str})
    injected = set(truth.loc[truth["DEFECT"] == "pat_outlier", "PART_ID"])
    assert len(injected) >= 4
    pat = lot["pat"]
    flagged = {o["part"] for o in pat["outliers"]} | {r["part"] for r in pat["rescreen"]}
    # every injected outlier is caught: sorted to the PAT bin, or (in the baseline) re-screened
    assert injected <= flagged
    parts = pd.read_csv(out / "parts.csv", dtype={"PART_ID": str})
    pat_binned = set(parts.loc[parts["HARD_BIN"] == 7, "PART_ID"])
    assert pat_binned == {o["part"] for o in pat["outliers"]}
    assert set(pat["dynamic"]["baseline_parts"]) >= {r["part"] for r in pat["rescreen"]}
    # normal parts flagged: at most the expected count (figures x screened parts x share) + 3 sd
    normal = flagged - injected
    screened = int((parts["PASS"] == 1).sum()) + len(pat_binned)
    expected = expected_false_share(BASELINE) * screened * len(pat["dynamic"]["limits"])
    assert len(normal) <= expected + 3 * np.sqrt(expected), (normal, expected)
    # the limits used are in lot.json, and on the outlier's result row
    results = pd.read_csv(out / "results.csv", dtype={"PART_ID": str})
    for o in pat["outliers"]:
        row = results[(results["PART_ID"] == o["part"]) & (results["PARAM"] == o["param"])]
        assert row["GRADE"].iloc[0] == "PAT" and row["PASS"].iloc[0] == 0
        assert row["LO_LIMIT"].iloc[0] == o["low"] and row["HI_LIMIT"].iloc[0] == o["high"]
    summary = CliRunner().invoke(main, ["summary", str(out)])
    assert "Re-screen list" in summary.output and "PAT outliers" in summary.output

"""Seeded population of the invented PX-401 lot: reproducible, plausible, with defects."""

from __future__ import annotations

import csv
import math

import numpy as np
import pytest

from sim_instruments.bench import SimBench, SimSettings
from sim_instruments.population import TRUTH_COLUMNS, make_part, make_population


def test_same_seed_same_lot_other_seed_other_lot():
    a = make_population(7, 20)
    b = make_population(7, 20)
    c = make_population(8, 20)
    assert a == b
    assert [p.vos_low_v for p in a] != [p.vos_low_v for p in c]
    assert make_population(7, 40)[:20] == a  # part k does not depend on the lot size
    assert make_part(7, 3) == a[3]


def test_distributions_and_defect_shares():
    parts = make_population(11, 4000)
    normal = [p for p in parts if p.defect == "none"]
    vos = np.array([p.vos_low_v for p in normal])
    # sample std of 15 uV population within ~5 % for n ~ 3900 (numpy reference; the standard
    # error of a sample sigma is about sigma / sqrt(2n), 1.1 % here: common practice, no source)
    assert np.std(vos) == pytest.approx(15e-6, rel=0.06)
    assert abs(np.mean(vos)) < 1.5e-6
    aol_db = np.array([20 * math.log10(p.aol_vv) for p in normal])
    # 20 log10(3e6) = 129.54 dB (arithmetic; 3e6 V/V is the invented population's median)
    assert np.median(aol_db) == pytest.approx(129.5, abs=0.3)
    iq = np.array([p.iq_a for p in normal])
    assert np.mean(iq) == pytest.approx(450e-6, rel=0.01)
    shares = {kind: sum(p.defect == kind for p in parts) / len(parts)
              for kind in ("open", "short", "outlier", "crossover")}
    # binomial: 4000 parts, 1 % -> 40 +- 6.3; 0.5 % -> 20 +- 4.5 (tolerance ~3 sigma; sigma =
    # sqrt(n p (1 - p)), the binomial standard deviation: common practice, no source)
    assert shares["open"] == pytest.approx(0.01, abs=0.005)
    assert shares["outlier"] == pytest.approx(0.01, abs=0.005)
    assert shares["short"] == pytest.approx(0.005, abs=0.0035)
    assert shares["crossover"] == pytest.approx(0.005, abs=0.0035)
    outliers = [abs(p.vos_low_v) for p in parts if p.defect == "outlier"]
    assert min(outliers) >= 0.3e-3 and max(outliers) <= 2e-3
    assert all(p.defect == "none" for p in make_population(11, 400, defects=False))


def test_truth_csv_has_every_column_and_db_figures(tmp_path):
    sim = SimBench(SimSettings(seed=3, parts=5))
    path = tmp_path / "sim_truth.csv"
    sim.write_truth(path)
    rows = list(csv.DictReader(path.open()))
    assert len(rows) == 5 and tuple(rows[0].keys()) == TRUTH_COLUMNS
    row, part = rows[2], sim.truth()[2]
    assert row["PART_ID"] == "D00003"
    # CMRR_dB = -20 log10 |slope| (common practice, no source; docs/methods.md "cm_sweep")
    assert float(row["CMRR_LOW_DB"]) == pytest.approx(-20 * math.log10(abs(part.cmrr_low_vv)))
    assert float(row["AOL_DB"]) == pytest.approx(20 * math.log10(part.aol_vv))
    assert float(row["CROSSOVER_VCM_V"]) == pytest.approx(5.0 - part.crossover_below_vplus_v)

"""The crossed two-way ANOVA of a gauge study against statsmodels and against a study by hand."""

from __future__ import annotations

import math

import numpy as np
import pandas as pd
import pytest

from station.config.limit_tables import Limit
from station.qualify.anova import StudyDataError, balance, crossed_anova
from station.qualify.study import db_to_slope, tolerance_of, verdict


def _study(parts=6, appraisers=4, repeats=3, seed=2):
    rng = np.random.default_rng(seed)
    part_effect = rng.normal(0, 5.0, parts)
    app_effect = rng.normal(0, 1.0, appraisers)
    inter = rng.normal(0, 0.5, (parts, appraisers))
    rows = [(f"P{i}", f"site {j + 1}", 10 + part_effect[i] + app_effect[j] + inter[i, j] + rng.normal(0, 0.7))
            for i in range(parts) for j in range(appraisers) for _ in range(repeats)]
    return pd.DataFrame(rows, columns=["part", "appraiser", "value"])


def test_sums_of_squares_and_components_match_statsmodels_anova_lm():
    sm = pytest.importorskip("statsmodels.formula.api")
    from statsmodels.stats.anova import anova_lm

    data = _study()
    ours = crossed_anova(data)
    # Reference: statsmodels' OLS fit with interaction and its ANOVA table (a general-purpose
    # library); for a balanced design type I and type II sums of squares agree.
    fit = sm.ols("value ~ C(part) * C(appraiser)", data=data).fit()
    table = anova_lm(fit, typ=2)
    ss = table["sum_sq"]
    df = table["df"]
    assert ours.part.ss == pytest.approx(ss["C(part)"], rel=1e-9)
    assert ours.appraiser.ss == pytest.approx(ss["C(appraiser)"], rel=1e-9)
    assert ours.interaction.ss == pytest.approx(ss["C(part):C(appraiser)"], rel=1e-9)
    assert ours.error.ss == pytest.approx(ss["Residual"], rel=1e-9)
    assert (ours.part.df, ours.appraiser.df, ours.interaction.df, ours.error.df) == tuple(
        int(df[k]) for k in ("C(part)", "C(appraiser)", "C(part):C(appraiser)", "Residual"))
    # Components from statsmodels' mean squares by the expected mean squares of the crossed
    # random-effects design (p parts, a appraisers, r repeats; published gauge-study formulas).
    ms = ss / df
    p, a, r = 6, 4, 3
    c = ours.components
    assert c.repeatability == pytest.approx(ms["Residual"], rel=1e-9)
    assert c.interaction == pytest.approx(max(0.0, (ms["C(part):C(appraiser)"] - ms["Residual"]) / r), rel=1e-9)
    assert c.appraiser == pytest.approx(max(0.0, (ms["C(appraiser)"] - ms["C(part):C(appraiser)"]) / (p * r)), rel=1e-9)
    assert c.part == pytest.approx((ms["C(part)"] - ms["C(part):C(appraiser)"]) / (a * r), rel=1e-9)


def test_a_small_study_by_hand():
    # 2 parts x 2 sites x 2 repeats. By hand: grand mean 5.25; part means 3.5, 7; site means
    # 4, 6.5; SS_part = 2*2*(1.75^2*2) = 24.5, SS_site = 2*2*(1.25^2*2) = 12.5,
    # SS_interaction = 2*(4*0.25^2) = 0.5, SS_error = 6 (df 4, MS 1.5); total 43.5.
    # Components: interaction (0.5-1.5)/2 < 0 -> 0; site (12.5-0.5)/4 = 3; part (24.5-0.5)/4 = 6;
    # GRR = sqrt(1.5 + 3) = 2.1213; ndc = floor(1.41 sqrt(6) / 2.1213) = 1.
    values = {("P1", "s1"): (1, 3), ("P1", "s2"): (4, 6), ("P2", "s1"): (5, 7), ("P2", "s2"): (8, 8)}
    data = pd.DataFrame([(p, s, v) for (p, s), vs in values.items() for v in vs],
                        columns=["part", "appraiser", "value"])
    result = crossed_anova(data)
    assert (result.part.ss, result.appraiser.ss, result.interaction.ss, result.error.ss) == pytest.approx(
        (24.5, 12.5, 0.5, 6.0))
    c = result.components
    assert (c.part, c.appraiser, c.interaction, c.repeatability) == pytest.approx((6.0, 3.0, 0.0, 1.5))
    assert c.grr == pytest.approx(math.sqrt(4.5))
    assert c.ndc == 1
    assert result.appraiser_means == pytest.approx({"s1": 4.0, "s2": 6.5})


def test_unbalanced_study_drops_the_part_with_a_missing_reading_and_says_so():
    data = _study(parts=5)
    missing = data.index[(data["part"] == "P3") & (data["appraiser"] == "site 2")][0]
    data.loc[missing, "value"] = float("inf")    # an over-range reading: no value
    balanced = balance(data)
    assert balanced.dropped_parts == ("P3",) and balanced.repeats == 3
    assert set(balanced.frame["part"]) == {"P0", "P1", "P2", "P4"}
    assert crossed_anova(balanced.frame).parts == 4
    with pytest.raises(StudyDataError, match="not balanced"):
        crossed_anova(data[data.index != missing])
    # A retest that gave a cell an extra value: the first r kept.
    extra = pd.concat([_study(parts=3), pd.DataFrame([("P0", "site 1", 99.0)], columns=["part", "appraiser", "value"])])
    kept = balance(extra)
    assert kept.trimmed_cells == 1 and 99.0 not in kept.frame["value"].to_numpy()


def test_too_few_parts_left_is_refused():
    data = _study(parts=2)
    data = data[~((data["part"] == "P1") & (data["appraiser"] == "site 1"))]
    with pytest.raises(StudyDataError, match="1 part"):
        balance(data)


def test_tolerances_and_verdicts():
    # 120 dB is |slope| <= 1e-6 V/V (20 log10, arithmetic); the window on the signed slope is 2e-6 wide.
    assert db_to_slope(120.0) == pytest.approx(1e-6)
    cmrr = Limit("cmrr", "low", 120.0, None, "dB", 12, "CMRR")
    tol = tolerance_of(cmrr, 0.0)
    assert tol is not None and tol.width == pytest.approx(2e-6)
    assert tol.pct_grr(1e-8) == pytest.approx(3.0)             # 6 x 1e-8 / 2e-6
    vos = Limit("vos", None, -50e-6, 50e-6, "V", 11, "Offset")
    assert tolerance_of(vos, 3e-6).pct_grr(1e-6) == pytest.approx(6.0)   # 6 x 1 uV / 100 uV
    step = Limit("cm_step", "transition", None, 150e-6, "V", 14, "Step")
    one = tolerance_of(step, 50e-6)
    assert one.kind == "one-sided" and one.pct_grr(1e-6) == pytest.approx(3.0)  # 3 x 1 uV / 100 uV
    # A guard-banded limit is judged against its spec limits, not the acceptance limits.
    guarded = Limit("vos", None, -48e-6, 48e-6, "V", 11, "Offset", spec_low=-50e-6, spec_high=50e-6)
    assert tolerance_of(guarded, 0.0).width == pytest.approx(100e-6)
    assert [verdict(x) for x in (9.99, 10.0, 30.0, 30.01)] == [
        "acceptable", "conditional", "conditional", "not acceptable"]

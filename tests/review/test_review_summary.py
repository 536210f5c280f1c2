"""Summary figures against independent computations on the same CSV files."""

from __future__ import annotations

from pathlib import Path

import numpy as np
import pandas as pd
import pytest
from scipy import stats

from station.config.limit_tables import load_limit_table  # noqa: E402
from station.review.capability import cpk  # noqa: E402
from station.review.export import tidy  # noqa: E402
from station.review.load import load_datalogs  # noqa: E402
from station.review.sites import site_difference  # noqa: E402
from station.review.summary import summarise  # noqa: E402
from tests.support.review_datalogs import LotSpec, make_datalog  # noqa: E402

RAW = ["vos_cm", "vos_force", "vos_span"]


@pytest.fixture(scope="module")
def folder(tmp_path_factory) -> Path:
    return make_datalog(tmp_path_factory.mktemp("sum") / "lot", LotSpec(parts=400, sites=4, seed=11, bad_site=3))


@pytest.fixture(scope="module")
def summary(folder):
    return summarise(load_datalogs([folder]), by="site")


def test_counts_and_yields_match_pandas_on_parts_csv(folder: Path, summary) -> None:
    parts = pd.read_csv(folder / "parts.csv")  # reference: plain pandas
    good = int((parts["PASS"] == 1).sum())
    failed = int((parts["PASS"] == 0).sum())
    o = summary.overview
    assert o["parts tested"] == len(parts)
    assert (o["good"], o["failed"], o["tester faults"]) == (good, failed, int(parts["PASS"].isna().sum()))
    assert o["retests"] == int(parts["RETEST"].sum())
    assert o["yield"] == pytest.approx(good / (good + failed))
    last = parts.drop_duplicates("PART_ID", keep="last")
    assert o["final yield"] == pytest.approx((last["PASS"] == 1).sum() / last["PASS"].notna().sum())
    # The sites of one index share its TEST_T, so the tester time per part is at most the
    # index time and at least the index time over the site count.
    assert o["tester time per part (ms)"] <= o["index time (ms)"] + 1e-9
    assert o["tester time per part (ms)"] >= o["index time (ms)"] / parts["SITE_NUM"].nunique() - 1e-9
    for row in summary.grades.itertuples():
        expected = ((parts["PASS"] == 1) & (parts["GRADE"] == row.grade)).sum() / (good + failed)
        assert row.share == pytest.approx(expected)


def test_bin_counts_and_pareto(folder: Path, summary) -> None:
    parts = pd.read_csv(folder / "parts.csv")
    soft = parts["SOFT_BIN"].value_counts()
    assert dict(zip(summary.soft_bins["bin"], summary.soft_bins["count"], strict=True)) == soft.to_dict()
    hard = parts["HARD_BIN"].value_counts()
    assert dict(zip(summary.hard_bins["bin"], summary.hard_bins["count"], strict=True)) == hard.to_dict()
    pareto = summary.pareto
    assert list(pareto["count"]) == sorted(pareto["count"], reverse=True)
    failing = parts[parts["PASS"] != 1]
    assert pareto["count"].sum() == len(failing)
    assert pareto["cumulative"].iloc[-1] == pytest.approx(1.0)


def test_site_yield_and_test_against_scipy(folder: Path, summary) -> None:
    parts = pd.read_csv(folder / "parts.csv")
    decided = parts[parts["PASS"].notna()]
    table = pd.crosstab(decided["SITE_NUM"], decided["PASS"])[[1.0, 0.0]].to_numpy()
    for row, (good, bad) in zip(summary.sites.itertuples(), table, strict=True):
        assert (row.good, row.failed) == (good, bad)
        # Reference: scipy's Fisher exact test of this site against the others pooled.
        rest = table.sum(axis=0) - [good, bad]
        assert row.p_vs_rest == pytest.approx(stats.fisher_exact([[good, bad], rest]).pvalue)
    # The bad site (wide offset spread) must be the one flagged.
    assert summary.sites.loc[summary.sites["differs"], "site"].tolist() == [3]
    assert summary.site_test.flagged


def test_site_test_chooses_chi_squared_or_fisher_and_matches_scipy() -> None:
    good, bad = np.array([180, 170, 175, 150]), np.array([20, 30, 25, 50])
    result = site_difference(good, bad)
    reference = stats.chi2_contingency(np.column_stack([good, bad]), correction=False)
    assert result.method.startswith("chi-squared")
    assert result.p_value == pytest.approx(reference.pvalue)
    assert result.flagged == (reference.pvalue < 0.01)
    two = site_difference(np.array([90, 80]), np.array([10, 20]))
    assert two.method.startswith("Fisher")
    assert two.p_value == pytest.approx(stats.fisher_exact([[90, 10], [80, 20]]).pvalue)
    same = site_difference(np.array([95, 96, 94]), np.array([5, 4, 6]))
    assert not same.flagged


def test_parameter_stats_match_numpy_and_exclude_over_range(folder: Path, tmp_path: Path) -> None:
    # Put over-range values into a copy: they must be counted, not averaged.
    results = pd.read_csv(folder / "results.csv", keep_default_na=False, na_values={"LO_LIMIT": [""]})
    vos_rows = results.index[results["PARAM"] == "vos"][:3]
    results["RESULT"] = results["RESULT"].astype(float)
    results.loc[vos_rows, "RESULT"] = np.inf
    copy = tmp_path / "over"
    copy.mkdir()
    for name in ("lot.json", "parts.csv", "limits.yaml"):
        (copy / name).write_bytes((folder / name).read_bytes())
    results.to_csv(copy / "results.csv", index=False)
    summary = summarise(load_datalogs([copy]))
    reference = pd.read_csv(copy / "results.csv")
    vos = reference.loc[reference["PARAM"] == "vos", "RESULT"].to_numpy()
    finite = vos[np.isfinite(vos)]
    row = summary.stats[(summary.stats["param"] == "vos")].iloc[0]
    assert (row["count"], row["over_range"]) == (len(vos), 3)
    assert row["mean"] == pytest.approx(np.mean(finite))
    assert row["sigma"] == pytest.approx(np.std(finite, ddof=1))
    assert (row["min"], row["max"]) == (finite.min(), finite.max())
    # numpy's default (linear) percentile is the same definition as pandas' quantile.
    assert [row["p1"], row["p50"], row["p99"]] == pytest.approx(np.percentile(finite, [1, 50, 99]))
    assert any("over-range" in n for n in summary.notes)
    raw = set(summary.stats["param"]) & set(RAW)
    assert not raw, "raw points are not computed figures"


def test_cpk_per_grade_by_the_published_formula(folder: Path, summary) -> None:
    table = load_limit_table(folder / "limits.yaml")
    reference = pd.read_csv(folder / "results.csv")
    slope_of = {"cmrr": "cmrr_slope", "psrr": "psrr_slope"}
    for grade in table.grades:
        for lim in grade.limits:
            param, low, high = lim.param, lim.low, lim.high
            if param in slope_of:
                # A rejection limit "L dB" is |slope| <= 10^(-L/20) on the signed slope (arithmetic).
                param, high = slope_of[param], 10 ** (-lim.low / 20)
                low = -high
            values = reference.loc[(reference["PARAM"] == param) &
                                   (reference["REGION"].fillna("") == (lim.region or "")), "RESULT"].to_numpy()
            values = values[np.isfinite(values)]
            mu, sigma = values.mean(), values.std(ddof=1)
            # Cpk = min(USL - mu, mu - LSL) / (3 sigma), one side if one limit: the textbook
            # process-capability index (common practice, no source; docs/methods.md).
            # numpy gives mu and sigma.
            sides = [(high - mu) / (3 * sigma)] if high is not None else []
            sides += [(mu - low) / (3 * sigma)] if low is not None else []
            row = summary.cpk[(summary.cpk["param"] == lim.param) & (summary.cpk["region"] == (lim.region or "")) &
                              (summary.cpk["grade"] == grade.name)]
            assert len(row) == 1
            assert row["cpk"].iloc[0] == pytest.approx(min(sides))


def test_cpk_function_two_sided_and_one_sided() -> None:
    # mu 1, sigma 1, limits -2 and 7: min(6, 3) / 3 = 1 (arithmetic of the Cpk formula;
    # common practice, no source).
    assert cpk(np.array([1.0]), np.array([1.0]), np.array([-2.0]), np.array([7.0]))[0] == pytest.approx(1.0)
    assert cpk(np.array([1.0]), np.array([1.0]), np.array([np.nan]), np.array([7.0]))[0] == pytest.approx(2.0)


def test_grouped_yield_and_tidy_csv(folder: Path, summary, tmp_path: Path) -> None:
    parts = pd.read_csv(folder / "parts.csv")
    frame = summary.by_table
    for row in frame.itertuples():
        at = parts[parts["SITE_NUM"] == int(row.site)]
        decided = at["PASS"].notna().sum()
        assert row.tested == len(at)
        assert row._6 == pytest.approx((at["PASS"] == 1).sum() / decided)
    long = tidy(summary)
    assert set(long.columns) == {"section", "key", "param", "region", "grade", "metric", "value"}
    assert {"overview", "hard_bins", "soft_bins", "failure_pareto", "sites", "parameters", "capability",
            "by_site"} <= set(long["section"])
    mean_vos = long[(long["section"] == "parameters") & (long["param"] == "vos") & (long["metric"] == "mean")]
    assert float(mean_vos["value"].iloc[0]) == pytest.approx(summary.stats.loc[
        summary.stats["param"] == "vos", "mean"].iloc[0])


def test_hour_grouping_and_several_datalogs(folder: Path, tmp_path: Path) -> None:
    later = make_datalog(tmp_path / "later", LotSpec(parts=60, sites=2, seed=3, lot_id="LOT-T9",
                                                    station="bench-2", start_t=1_796_061_600.0 + 7200))
    logs = load_datalogs([folder, later])
    s = summarise(logs, by="station")
    assert s.overview["parts tested"] == len(logs.parts)
    assert sorted(s.by_table["station"]) == ["bench-1", "bench-2"]
    hours = summarise(logs, by="hour").by_table
    assert len(hours) >= 2
    assert hours["tested"].sum() == len(logs.parts)


def test_a_datalog_repeated_under_new_ids_summarises_to_the_same_figures(folder: Path, tmp_path: Path,
                                                                         summary) -> None:
    """Eight copies of the lot under new part ids: counts eight times over, the same yields,
    means and medians (the speed of a million rows is the benchmark's summary_1m_rows_s)."""
    copies = 8
    results = pd.read_csv(folder / "results.csv", dtype=str, keep_default_na=False)
    parts = pd.read_csv(folder / "parts.csv", dtype=str, keep_default_na=False)
    big = tmp_path / "big"
    big.mkdir()
    for name in ("lot.json", "limits.yaml"):
        (big / name).write_bytes((folder / name).read_bytes())
    pd.concat([results.assign(PART_ID=results["PART_ID"] + f"-{k}") for k in range(copies)]).to_csv(
        big / "results.csv", index=False)
    pd.concat([parts.assign(PART_ID=parts["PART_ID"] + f"-{k}") for k in range(copies)]).to_csv(
        big / "parts.csv", index=False)
    repeated = summarise(load_datalogs([big]), by="site")
    for key in ("parts tested", "good", "failed", "tester faults", "retests"):
        assert repeated.overview[key] == copies * summary.overview[key], key
    assert repeated.overview["yield"] == pytest.approx(summary.overview["yield"])
    assert repeated.overview["final yield"] == pytest.approx(summary.overview["final yield"])
    assert repeated.stats["count"].tolist() == [copies * n for n in summary.stats["count"]]
    for column in ("mean", "min", "max", "p50"):
        assert repeated.stats[column].to_numpy() == pytest.approx(summary.stats[column].to_numpy(), nan_ok=True)
    assert repeated.hard_bins["count"].tolist() == [copies * n for n in summary.hard_bins["count"]]
    assert repeated.by_table["yield"].to_numpy() == pytest.approx(summary.by_table["yield"].to_numpy())


def test_without_limits_yaml_the_logged_limit_columns_give_cpk(folder: Path, tmp_path: Path) -> None:
    copy = tmp_path / "nolimits"
    copy.mkdir()
    for name in ("lot.json", "parts.csv", "results.csv"):
        (copy / name).write_bytes((folder / name).read_bytes())
    s = summarise(load_datalogs([copy]))
    assert "LO_LIMIT/HI_LIMIT" in s.limits_source
    row = s.cpk[(s.cpk["param"] == "vos") & (s.cpk["grade"] == "A")].iloc[0]
    # Grade A's +-50 uV as logged on the rows of grade-A parts (limits/px401.yaml).
    assert (row["lsl"], row["usl"]) == (-5e-05, 5e-05)
    full = summarise(load_datalogs([folder]))
    reference = full.cpk[(full.cpk["param"] == "vos") & (full.cpk["grade"] == "A")].iloc[0]
    assert row["cpk"] == pytest.approx(reference["cpk"])


def test_index_times_share_each_index_over_its_parts() -> None:
    # Hand-built: indexes of 800 ms (4 sites), 820 ms (4 sites), 700 ms (2 sites): the mean
    # index is (800 + 820 + 700) / 3 = 773.3 ms and the tester time per part 2320 / 10 = 232 ms.
    from station.review.summary import index_times
    rows = [(800.0, s) for s in (1, 2, 3, 4)] + [(820.0, s) for s in (1, 2, 3, 4)] + [(700.0, s) for s in (1, 2)]
    frame = pd.DataFrame({"TEST_T": [t for t, _ in rows], "SITE_NUM": [s for _, s in rows],
                          "DATALOG": ["a"] * len(rows)})
    times = index_times(frame)
    assert times["index time (ms)"] == pytest.approx(2320 / 3)
    assert times["tester time per part (ms)"] == pytest.approx(232.0)
    # Two indexes of equal time back to back are still two indexes (site 1 starts again).
    same = pd.DataFrame({"TEST_T": [500.0] * 4, "SITE_NUM": [1, 2, 1, 2], "DATALOG": ["a"] * 4})
    assert index_times(same) == {"index time (ms)": 500.0, "tester time per part (ms)": 250.0}

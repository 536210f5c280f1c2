"""Distribution figures and capability (Cpk) of the computed results, per parameter and region.

Non-finite results (over-range: the DMM overloaded, or a slope over such a point) are
counted but left out of mean, sigma, min, max and the percentiles: they have no value to
average. Sigma is the sample standard deviation (n - 1).
Cpk = min(USL - mu, mu - LSL) / (3 sigma); with one limit only, that side alone.

Rejection figures (CMRR, PSRR) are judged on their signed slope in V/V, not on dB: dB is
-20 log10 |slope| of a slope whose distribution is centred near 0, so the dB values are badly
skewed (a slope near zero reads 150 dB) and a normal Cpk of them means little. A limit
"L dB" is the window |slope| <= 10^(-L/20), so Cpk = min(s - mu, mu + s) / (3 sigma) with
s = 10^(-L/20) and mu, sigma of the slope rows (`cmrr_slope`, `psrr_slope`) of the same
region. AOL keeps its dB (its slope is far from zero and of one sign). The repeatability
study uses the same convention (station/qualify/study.py).
"""

from __future__ import annotations

import numpy as np
import pandas as pd

from station.review.load import computed_rows, text_codes

PERCENTILES = (1, 50, 99)
STAT_COLUMNS = ["param", "region", "units", "count", "over_range", "mean", "sigma",
                "min", "p1", "p50", "p99", "max"]


def parameter_stats(results: pd.DataFrame) -> pd.DataFrame:
    """count, over_range, mean, sigma, min, p1, p50, p99, max per (param, region) of computed rows."""
    rows = computed_rows(results[["PARAM", "REGION", "UNITS", "RESULT"]])   # not every column: a million rows
    if rows.empty:
        return pd.DataFrame(columns=STAT_COLUMNS)
    # Group on one integer key per (param, region): grouping a million rows of text is slow.
    param_codes, param_names = text_codes(rows["PARAM"])
    region_codes, region_names = text_codes(rows["REGION"])
    unit_codes, unit_names = text_codes(rows["UNITS"])
    key = param_codes.astype(np.int64) * len(region_names) + region_codes
    values = rows["RESULT"].to_numpy(dtype=float)
    finite = np.isfinite(values)
    total = pd.Series(values).groupby(key).size()
    grouped = pd.Series(values[finite]).groupby(key[finite])
    figures = grouped.agg(mean="mean", sigma="std", min="min", max="max")
    quantiles = grouped.quantile([p / 100 for p in PERCENTILES]).unstack()
    quantiles.columns = [f"p{p}" for p in PERCENTILES]
    out = pd.concat([total.rename("count"), figures, quantiles], axis=1)
    out["count"] = out["count"].fillna(0).astype(int)
    out["over_range"] = out["count"] - grouped.size().reindex(out.index, fill_value=0).to_numpy()
    out["units"] = unit_names[pd.Series(unit_codes).groupby(key).first().reindex(out.index).to_numpy()]
    keys = out.index.to_numpy()
    out["param"] = param_names[keys // len(region_names)]
    out["region"] = region_names[keys % len(region_names)]
    return out.sort_values(["param", "region"], kind="stable").reset_index(drop=True)[STAT_COLUMNS]


def cpk(mean: np.ndarray, sigma: np.ndarray, lsl: np.ndarray, usl: np.ndarray) -> np.ndarray:
    """Cpk = min(USL - mu, mu - LSL) / (3 sigma); a missing limit (nan) drops that side."""
    mean, sigma = np.asarray(mean, float), np.asarray(sigma, float)
    upper = (np.asarray(usl, float) - mean) / (3 * sigma)
    lower = (mean - np.asarray(lsl, float)) / (3 * sigma)
    with np.errstate(invalid="ignore"):
        return np.fmin(upper, lower)  # fmin ignores the nan of a missing side


# Rejection figures whose Cpk is taken on their slope (V/V).
SLOPE_OF_REJECTION = {"cmrr": "cmrr_slope", "psrr": "psrr_slope"}
CPK_COLUMNS = ["param", "region", "grade", "lsl", "usl", "mean", "sigma", "cpk", "units", "basis"]


def db_limit_to_slope(db: np.ndarray) -> np.ndarray:
    """|slope| of a rejection limit in dB: 10^(-dB/20) (nan stays nan)."""
    return np.power(10.0, -np.asarray(db, float) / 20.0)


def capability(stats_frame: pd.DataFrame, limits: pd.DataFrame) -> pd.DataFrame:
    """Cpk per (param, region, grade): stats joined with the limits frame (GRADE, PARAM, REGION,
    LSL, USL). CMRR and PSRR rows are on their slope in V/V (`units` V/V, `basis` "slope");
    their lsl/usl are then -s and +s, s = 10^(-LSL/20)."""
    if limits.empty or stats_frame.empty:
        return pd.DataFrame(columns=CPK_COLUMNS)
    joined = stats_frame.merge(limits.rename(columns={"PARAM": "param", "REGION": "region", "GRADE": "grade",
                                                      "LSL": "lsl", "USL": "usl"}),
                               on=["param", "region"], how="inner")
    joined["basis"] = ""
    slopes = stats_frame.set_index(["param", "region"])
    for index, row in joined.iterrows():
        slope_param = SLOPE_OF_REJECTION.get(str(row["param"]))
        if slope_param is None or (slope_param, row["region"]) not in slopes.index or np.isnan(row["lsl"]):
            continue
        stats = slopes.loc[(slope_param, row["region"])]
        edge = float(db_limit_to_slope(np.array([row["lsl"]]))[0])
        joined.loc[index, ["lsl", "usl", "mean", "sigma", "units", "basis"]] = [
            -edge, edge, stats["mean"], stats["sigma"], "V/V", "slope"]
    joined["cpk"] = cpk(joined["mean"].astype(float), joined["sigma"].astype(float),
                        joined["lsl"].astype(float), joined["usl"].astype(float))
    return joined[CPK_COLUMNS]

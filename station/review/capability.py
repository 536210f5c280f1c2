"""Distribution figures and capability (Cpk) of the computed results, per parameter and region.

Non-finite results (over-range: the DMM overloaded, or a slope over such a point) are
counted but left out of mean, sigma, min, max and the percentiles: they have no value to
average. Sigma is the sample standard deviation (n - 1).
Cpk = min(USL - mu, mu - LSL) / (3 sigma); with one limit only, that side alone.
"""

from __future__ import annotations

import numpy as np
import pandas as pd

from station.review.load import computed_rows

PERCENTILES = (1, 50, 99)
STAT_COLUMNS = ["param", "region", "units", "count", "over_range", "mean", "sigma",
                "min", "p1", "p50", "p99", "max"]


def parameter_stats(results: pd.DataFrame) -> pd.DataFrame:
    """count, over_range, mean, sigma, min, p1, p50, p99, max per (param, region) of computed rows."""
    rows = computed_rows(results)
    if rows.empty:
        return pd.DataFrame(columns=STAT_COLUMNS)
    values = rows["RESULT"].to_numpy()
    finite = np.isfinite(values)
    keys = [rows["PARAM"].astype(str).to_numpy(), rows["REGION"].astype(str).to_numpy()]
    total = pd.Series(values).groupby(keys).size()
    frame = pd.DataFrame({"param": keys[0][finite], "region": keys[1][finite], "value": values[finite]})
    grouped = frame.groupby(["param", "region"])["value"]
    figures = grouped.agg(mean="mean", sigma="std", min="min", max="max")
    quantiles = grouped.quantile([p / 100 for p in PERCENTILES]).unstack()
    quantiles.columns = [f"p{p}" for p in PERCENTILES]
    out = pd.concat([total.rename("count"), figures, quantiles], axis=1)
    out.index.names = ["param", "region"]
    out["count"] = out["count"].fillna(0).astype(int)
    finite_count = grouped.size().reindex(out.index, fill_value=0)
    out["over_range"] = out["count"] - finite_count.to_numpy()
    units = rows.groupby([keys[0], keys[1]])["UNITS"].first().astype(str)
    units.index.names = ["param", "region"]
    out["units"] = units
    return out.reset_index()[STAT_COLUMNS]


def cpk(mean: np.ndarray, sigma: np.ndarray, lsl: np.ndarray, usl: np.ndarray) -> np.ndarray:
    """Cpk = min(USL - mu, mu - LSL) / (3 sigma); a missing limit (nan) drops that side."""
    mean, sigma = np.asarray(mean, float), np.asarray(sigma, float)
    upper = (np.asarray(usl, float) - mean) / (3 * sigma)
    lower = (mean - np.asarray(lsl, float)) / (3 * sigma)
    with np.errstate(invalid="ignore"):
        return np.fmin(upper, lower)  # fmin ignores the nan of a missing side


def capability(stats_frame: pd.DataFrame, limits: pd.DataFrame) -> pd.DataFrame:
    """Cpk per (param, region, grade): stats joined with the limits frame (GRADE, PARAM, REGION, LSL, USL)."""
    if limits.empty or stats_frame.empty:
        return pd.DataFrame(columns=["param", "region", "grade", "lsl", "usl", "mean", "sigma", "cpk"])
    joined = stats_frame.merge(limits.rename(columns={"PARAM": "param", "REGION": "region", "GRADE": "grade",
                                                      "LSL": "lsl", "USL": "usl"}),
                               on=["param", "region"], how="inner")
    joined["cpk"] = cpk(joined["mean"], joined["sigma"], joined["lsl"], joined["usl"])
    return joined[["param", "region", "grade", "lsl", "usl", "mean", "sigma", "cpk"]]

"""The summary's figures as one tidy CSV: one row per figure, a `section` column says which table.

Columns: section, key, param, region, grade, metric, value. `key` names the row within its
section (a bin number, a site, a group); values are in SI units (V, A, V/V) or dB, shares as
fractions.
"""

from __future__ import annotations

from pathlib import Path

import pandas as pd

from station.review.summary import Summary

COLUMNS = ["section", "key", "param", "region", "grade", "metric", "value"]


def _long(frame: pd.DataFrame, section: str, key: str | None, ids: list[str], metrics: list[str]) -> pd.DataFrame:
    if frame is None or frame.empty:
        return pd.DataFrame(columns=COLUMNS)
    present = [m for m in metrics if m in frame.columns]
    long = frame.melt(id_vars=[c for c in ([key] if key else []) + ids if c in frame.columns],
                      value_vars=present, var_name="metric", value_name="value")
    long.insert(0, "section", section)
    if key:
        long = long.rename(columns={key: "key"})
    return long


def tidy(summary: Summary) -> pd.DataFrame:
    parts = [pd.DataFrame([{"section": "overview", "key": k, "metric": k, "value": v}
                           for k, v in summary.overview.items()])]
    parts.append(_long(summary.grades, "grade_yield", None, ["grade"], ["parts", "share"]))
    parts.append(_long(summary.hard_bins, "hard_bins", "bin", [], ["count", "share"]))
    parts.append(_long(summary.soft_bins, "soft_bins", "bin", [], ["count", "share"]))
    parts.append(_long(summary.pareto, "failure_pareto", "bin", [], ["count", "share", "cumulative"]))
    parts.append(_long(summary.sites, "sites", "site", [], ["tested", "good", "failed", "faults", "yield",
                                                           "p_vs_rest", "differs"]))
    test = summary.site_test
    parts.append(pd.DataFrame([{"section": "site_test", "key": test.method, "metric": m, "value": v}
                               for m, v in (("statistic", test.statistic), ("p_value", test.p_value),
                                            ("flagged", test.flagged))]))
    if summary.by_table is not None and summary.by:
        frame = summary.by_table
        metrics = [c for c in frame.columns if c != summary.by]
        parts.append(_long(frame, f"by_{summary.by}", summary.by, [], metrics))
    stats = summary.stats
    parts.append(_long(stats, "parameters", None, ["param", "region"],
                       ["count", "over_range", "mean", "sigma", "min", "p1", "p50", "p99", "max"]))
    parts.append(_long(summary.cpk, "capability", None, ["param", "region", "grade"], ["lsl", "usl", "cpk"]))
    frames = [p for p in parts if not p.empty]
    out = pd.concat(frames, ignore_index=True)
    for column in COLUMNS:
        if column not in out.columns:
            out[column] = ""
    return out[COLUMNS].fillna({"key": "", "param": "", "region": "", "grade": ""})


def write_csv(summary: Summary, path: str | Path) -> None:
    tidy(summary).to_csv(path, index=False)

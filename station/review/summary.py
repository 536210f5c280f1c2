"""End-of-shift figures of one or more datalogs: yield, bins, sites, time, distributions, Cpk.

All figures are pandas frames computed with vectorised group-bys, so a million result rows
summarise in seconds. Definitions (also printed with the tables):
- parts tested: rows of parts.csv (every insertion, retests included);
- yield: good / (good + failed); tester faults have no pass/fail and are left out;
- final yield: the same over the last test of each part id (after retests);
- bin shares: of all parts tested.
"""

from __future__ import annotations

from dataclasses import dataclass, field
from datetime import UTC, datetime

import numpy as np
import pandas as pd

from station.config.shifts import ShiftCalendar
from station.review.budget import budget_distribution, logged_budgets
from station.review.capability import capability, parameter_stats
from station.review.limits import limits_in_force
from station.review.load import Datalogs
from station.review.sites import SiteTest, site_table
from station.screen.review import ScreenReview, screen_review

GROUPINGS = ("site", "lot", "station", "hour", "shift")


@dataclass
class Summary:
    overview: dict[str, float | int | str]
    grades: pd.DataFrame        # grade, parts, share (of decided parts)
    hard_bins: pd.DataFrame     # bin, name, pass, count, share
    soft_bins: pd.DataFrame
    pareto: pd.DataFrame        # failing soft bins, most first: bin, name, count, share, cumulative
    sites: pd.DataFrame         # site, tested, good, failed, faults, yield, p_vs_rest, differs
    site_test: SiteTest
    stats: pd.DataFrame         # per param and region, see review_capability.STAT_COLUMNS
    cpk: pd.DataFrame           # per param, region and grade
    limits_source: str
    grade_order: list[str]
    by: str | None = None
    by_table: pd.DataFrame | None = None
    notes: list[str] = field(default_factory=list)
    screening: ScreenReview | None = None   # lot-control alarms and PAT (station/screen/review.py)
    budgets: pd.DataFrame | None = None   # per application, when the lot logged budget rows


def summarise(logs: Datalogs, by: str | None = None, shifts: ShiftCalendar | None = None) -> Summary:
    """The summary of datalog folders; `by` adds a yield table (by "shift" needs the calendar)."""
    parts = logs.parts
    limits, limits_source, table = limits_in_force(logs)
    grade_order = [g.name for g in table.grades] if table is not None else \
        list(dict.fromkeys(limits["GRADE"].tolist()))
    stats = parameter_stats(logs.results)
    sites, site_test = site_table(parts)
    summary = Summary(
        overview=overview(logs),
        grades=grade_yield(parts, grade_order),
        hard_bins=bin_counts(parts, "HARD_BIN", logs.bin_names("hard_bins"), logs.bin_passing("hard_bins")),
        soft_bins=bin_counts(parts, "SOFT_BIN", logs.bin_names("soft_bins"), logs.bin_passing("soft_bins")),
        pareto=failure_pareto(parts, logs.bin_names("soft_bins")),
        sites=sites, site_test=site_test, stats=stats, cpk=capability(stats, limits),
        limits_source=limits_source, grade_order=grade_order, notes=list(logs.warnings),
        screening=screen_review(logs))
    logged = logged_budgets(logs.results)
    if not logged.empty:
        summary.budgets = budget_distribution(logged)
    if by is not None:
        summary.by = by
        summary.by_table = yield_by(parts, group_key(logs, by, shifts), by, grade_order)
    summary.notes += figure_notes(stats, summary.cpk)
    return summary


def figure_notes(stats: pd.DataFrame, cpk: pd.DataFrame) -> list[str]:
    """Notes on how the parameter figures and Cpk were computed (also for the store's summary)."""
    notes = []
    over = int(stats["over_range"].sum()) if not stats.empty else 0
    if over:
        notes.append(f"{over} over-range (non-finite) results are counted but left out "
                     "of mean, sigma, percentiles and Cpk")
    if not cpk.empty and "basis" in cpk and (cpk["basis"] == "slope").any():
        notes.append("Cpk of CMRR and PSRR is on their slope in V/V: a limit 'L dB' is the window "
                     "|slope| <= 10^(-L/20), and mean and sigma are the slope's (dB values are skewed); "
                     "AOL's Cpk is on dB")
    return notes


def overview(logs: Datalogs) -> dict[str, float | int | str]:
    parts = logs.parts
    decided = parts["PASS"].notna()
    good = int((parts["PASS"] == 1).sum())
    failed = int((parts["PASS"] == 0).sum())
    last = parts.drop_duplicates(["DATALOG", "LOT_ID", "PART_ID"], keep="last")
    last_decided = last["PASS"].notna()
    hours = elapsed_hours(logs)
    return {
        "datalogs": len(logs.folders),
        "lots": ", ".join(sorted({str(x) for x in parts["LOT_ID"].unique()})),
        "parts tested": len(parts),
        "good": good,
        "failed": failed,
        "tester faults": int((~decided).sum()),
        "retests": int(parts["RETEST"].sum()),
        "yield": good / (good + failed) if good + failed else float("nan"),
        "final yield": float((last["PASS"] == 1).sum() / last_decided.sum()) if last_decided.any() else float("nan"),
        **index_times(parts),
        "elapsed (h)": hours,
        "parts per hour": len(parts) / hours if hours > 0 else float("nan"),
    }


def index_times(parts: pd.DataFrame) -> dict[str, float]:
    """Every part row carries its handler index's time (TEST_T: the sites of one index share
    it). An index is a run of consecutive rows with the same TEST_T and rising site numbers;
    the tester time per part is the index time shared out over the parts it tested."""
    timed = parts[parts["TEST_T"].notna()]
    if timed.empty:
        return {"index time (ms)": float("nan"), "tester time per part (ms)": float("nan")}
    t, site, log = (timed[c].to_numpy() for c in ("TEST_T", "SITE_NUM", "DATALOG"))
    new_index = np.ones(len(timed), dtype=bool)
    new_index[1:] = (t[1:] != t[:-1]) | (site[1:] <= site[:-1]) | (log[1:] != log[:-1])
    index_ms = t[new_index]
    return {"index time (ms)": float(index_ms.mean()),
            "tester time per part (ms)": float(index_ms.sum() / len(timed))}


def elapsed_hours(logs: Datalogs) -> float:
    """Time on the station: each lot's start_t..end_t, else the span of its parts' END_T."""
    total = 0.0
    for index, lot in enumerate(logs.lots):
        start, end = lot.get("start_t"), lot.get("end_t")
        if isinstance(start, int | float) and isinstance(end, int | float) and end > start:
            total += end - start
            continue
        ends = logs.parts.loc[logs.parts["DATALOG"] == index, "END_T"].dropna()
        first_time = logs.parts.loc[logs.parts["DATALOG"] == index, "TEST_T"].dropna()
        if len(ends):
            # The first part's own test time precedes its END_T.
            total += ends.max() - ends.min() + (first_time.iloc[0] / 1000.0 if len(first_time) else 0.0)
    return total / 3600.0


def grade_yield(parts: pd.DataFrame, grade_order: list[str]) -> pd.DataFrame:
    decided = parts[parts["PASS"].notna()]
    good = decided[decided["PASS"] == 1]
    counts = good["GRADE"].value_counts()
    names = list(grade_order) + [g for g in counts.index if g not in grade_order]
    frame = pd.DataFrame({"grade": names, "parts": [int(counts.get(g, 0)) for g in names]})
    frame["share"] = frame["parts"] / len(decided) if len(decided) else np.nan
    return frame


def bin_counts(parts: pd.DataFrame, column: str, names: dict[int, str],
               passing: dict[int, bool]) -> pd.DataFrame:
    counts = parts[column].value_counts().sort_index()
    frame = pd.DataFrame({"bin": counts.index.astype(int), "count": counts.to_numpy()})
    frame["name"] = frame["bin"].map(lambda b: names.get(int(b), ""))
    frame["pass"] = frame["bin"].map(lambda b: passing.get(int(b), False))
    frame["share"] = frame["count"] / len(parts) if len(parts) else np.nan
    return frame[["bin", "name", "pass", "count", "share"]]


def failure_pareto(parts: pd.DataFrame, names: dict[int, str]) -> pd.DataFrame:
    """Soft bins of failed parts and tester faults, most frequent first, with cumulative share."""
    failing = parts[parts["PASS"] != 1]
    counts = failing["SOFT_BIN"].value_counts()
    frame = pd.DataFrame({"bin": counts.index.astype(int), "count": counts.to_numpy()})
    frame = frame.sort_values(["count", "bin"], ascending=[False, True], kind="stable").reset_index(drop=True)
    frame["name"] = frame["bin"].map(lambda b: names.get(int(b), ""))
    frame["share"] = frame["count"] / len(parts) if len(parts) else np.nan
    total = frame["count"].sum()
    frame["cumulative"] = frame["count"].cumsum() / total if total else np.nan
    return frame[["bin", "name", "count", "share", "cumulative"]]


def group_key(logs: Datalogs, by: str, shifts: ShiftCalendar | None = None) -> pd.Series:
    parts = logs.parts
    if by == "shift":
        if shifts is None:
            raise ValueError("grouping by shift needs the floor's shift calendar")
        return pd.Series(shifts.labels(parts["END_T"].to_numpy(dtype=float)), index=parts.index)
    if by == "site":
        return parts["SITE_NUM"].astype(int).astype(str)
    if by == "lot":
        return parts["LOT_ID"].astype(str)
    if by == "station":
        stations = {i: str(lot.get("station", "?")) for i, lot in enumerate(logs.lots)}
        return parts["DATALOG"].map(stations)
    if by == "hour":
        hour = np.floor(parts["END_T"].fillna(0) / 3600.0) * 3600.0
        return hour.map(lambda t: datetime.fromtimestamp(t, UTC).strftime("%Y-%m-%d %H:00"))
    raise ValueError(f"cannot group by {by!r}: choose one of {', '.join(GROUPINGS)}")


def yield_by(parts: pd.DataFrame, key: pd.Series, name: str, grade_order: list[str]) -> pd.DataFrame:
    """tested, good, failed, faults, yield and yield per grade for each group."""
    frame = pd.DataFrame({"key": key.to_numpy(), "pass": parts["PASS"].to_numpy(),
                          "grade": parts["GRADE"].to_numpy()})
    grouped = frame.groupby("key", sort=True)
    out = pd.DataFrame({"tested": grouped.size(),
                        "good": grouped["pass"].apply(lambda s: int((s == 1).sum())),
                        "failed": grouped["pass"].apply(lambda s: int((s == 0).sum()))})
    out["faults"] = out["tested"] - out["good"] - out["failed"]
    decided = out["good"] + out["failed"]
    out["yield"] = out["good"] / decided.where(decided > 0)
    good = frame[frame["pass"] == 1]
    per_grade = good.groupby(["key", "grade"]).size().unstack(fill_value=0)
    for grade in grade_order:
        counts = per_grade[grade] if grade in per_grade else pd.Series(0, index=out.index)
        out[f"yield {grade}"] = counts.reindex(out.index, fill_value=0) / decided.where(decided > 0)
    return out.reset_index().rename(columns={"key": name})

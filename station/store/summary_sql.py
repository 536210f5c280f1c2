"""The end-of-shift summary computed by the database: the same figures as
station/review/summary.py computes from folders, but as SQL group-bys inside PostgreSQL (the
store) or DuckDB (Parquet history), so only the small tables of counts and statistics travel.

One SQL text serves both engines; `Engine` runs it (placeholders are `%s` in the text and
become `?` for DuckDB). Filters are parameters, never spliced into the text. The site test,
Cpk and the shaping of the tables are the folder summary's own code, fed with the counts.

Tables read: lot_list (lot_key, station, lot_id, product, start_t, end_t, limits_sha256), parts, results,
bins, applied_files (the limit table each lot was graded with, to take grades and limits).
"""

from __future__ import annotations

import math
import time
from collections.abc import Callable
from dataclasses import dataclass
from datetime import UTC, datetime

import numpy as np
import pandas as pd

from station.config.limit_tables import LimitTable, parse_limit_table
from station.config.shifts import NO_SHIFT, ShiftCalendar
from station.review.capability import STAT_COLUMNS, capability
from station.review.load import RAW_PARAMS
from station.review.sites import site_table_from_counts
from station.review.summary import Summary, figure_notes

PERCENTILES = (1, 50, 99)       # as station/review/capability.py
# "The first lot" (its grades, limits and bin names rule): the earliest start, as the folder
# summary takes the first folder and folders are usually given in time order. Not the lot_key:
# in the store that is publish order, in Parquet history a hash.
def lot_order(alias: str) -> str:
    """ORDER BY terms for the lots of table alias `alias`, earliest first."""
    return f"{alias}.start_t NULLS LAST, {alias}.lot_key"


@dataclass
class Engine:
    """Runs a query (text with %s placeholders, parameters) and returns a frame."""

    run: Callable[[str, list], pd.DataFrame]
    finite: str                 # SQL: true where `result` is a finite number
    name: str
    headers: str                # SQL: a table (lot_key, header) of each lot's lot.json as text


@dataclass(frozen=True)
class Selection:
    since_t: float | None = None     # parts that ended at or after this Unix time
    station: str | None = None
    product: str | None = None
    until_t: float | None = None     # ... and before this one (a shift's end)
    window: str | None = None        # the window in words (a shift), for the notes

    def describe(self) -> str:
        parts = []
        if self.window is not None:
            parts.append(f"parts ended in the {self.window}")
        elif self.since_t is not None:
            parts.append(f"parts ended since {datetime.fromtimestamp(self.since_t, UTC):%Y-%m-%d %H:%M} UTC")
        if self.station is not None:
            parts.append(f"station {self.station}")
        if self.product is not None:
            parts.append(f"product {self.product}")
        return ", ".join(parts) or "everything in the store"


def parse_since(text: str, now: float | None = None) -> float:
    """'8h', '30m', '2d', '45s' before now, as a Unix time; ValueError if not of that form."""
    units = {"s": 1, "m": 60, "h": 3600, "d": 86400}
    text = text.strip().lower()
    if len(text) < 2 or text[-1] not in units:
        raise ValueError(f"{text!r}: give a duration like 8h, 30m or 2d")
    try:
        amount = float(text[:-1])
    except ValueError:
        raise ValueError(f"{text!r}: give a duration like 8h, 30m or 2d") from None
    if not math.isfinite(amount) or amount <= 0:
        raise ValueError(f"{text!r}: the duration must be positive")
    return (time.time() if now is None else now) - amount * units[text[-1]]


def _ctes(sel: Selection) -> tuple[str, list]:
    """WITH sel_lots, sel_parts, sel_results, and their parameters."""
    where: list[str] = []
    params: list[object] = []
    if sel.station is not None:
        where.append("station = %s")
        params.append(sel.station)
    if sel.product is not None:
        where.append("product = %s")
        params.append(sel.product)
    part_where = ""
    window: list[float] = []
    if sel.since_t is not None:
        ends = "end_t >= %s" + (" AND end_t < %s" if sel.until_t is not None else "")
        window = [sel.since_t] + ([sel.until_t] if sel.until_t is not None else [])
        where.append(f"lot_key IN (SELECT lot_key FROM parts WHERE {ends})")
        params.extend(window)
        part_where = "WHERE p." + ends.replace(" AND end_t", " AND p.end_t")
    lots = "SELECT lot_key, station, lot_id, product, start_t, end_t, limits_sha256 FROM lot_list"
    if where:
        lots += " WHERE " + " AND ".join(where)
    sql = f"""WITH sel_lots AS ({lots}),
    sel_parts AS (SELECT p.*, l.station, l.lot_id FROM parts p JOIN sel_lots l ON p.lot_key = l.lot_key
                  {part_where})"""
    return sql, params + window


def _results_cte(engine: Engine, sel: Selection, lot_keys: list[int] | None) -> tuple[str, list]:
    """sel_results, and its parameters. Without --since the lots are named by their keys (or,
    with no filter at all, not named), so the database can read (param, region, result) in
    order from the results index alone (schema migration 2) instead of sorting every row."""
    params: list = []
    if sel.since_t is not None:
        where = "EXISTS (SELECT 1 FROM sel_parts p WHERE p.lot_key = r.lot_key AND p.part_seq = r.part_seq)"
    elif lot_keys is None:
        where = "true"
    else:
        where = f"r.lot_key IN ({', '.join('%s' for _ in lot_keys) or 'NULL'})"
        params = list(lot_keys)
    raw = ", ".join("%s" for _ in RAW_PARAMS)
    return f""",
    sel_results AS (SELECT r.param, r.region, r.units, r.result,
                           CASE WHEN {engine.finite} THEN r.result END AS fin
                    FROM results r WHERE {where} AND r.param NOT IN ({raw}))""", params + sorted(RAW_PARAMS)


def query_selected(engine: Engine, sel: Selection, body: str, results: bool = False,
           extra: list | None = None, lot_keys: list[int] | None = None) -> pd.DataFrame:
    ctes, params = _ctes(sel)
    if results:
        text, more = _results_cte(engine, sel, lot_keys)
        ctes += text
        params = params + more
    return engine.run(f"{ctes}\n{body}", params + list(extra or []))


def summarise_sql(engine: Engine, sel: Selection, by: str | None = None,
                  shifts: ShiftCalendar | None = None) -> Summary:
    """The Summary of the selected lots, as station/review/summary.py would give for their folders."""
    from station.review.limits import table_limits

    q = lambda body, **kw: query_selected(engine, sel, body, **kw)  # noqa: E731
    lots = q(f"SELECT lot_key, station, lot_id, start_t, end_t FROM sel_lots s ORDER BY {lot_order('s')}")
    counts = q("""SELECT count(*) AS tested, count(*) FILTER (WHERE pass = 1) AS good,
                         count(*) FILTER (WHERE pass = 0) AS failed, coalesce(sum(retest), 0) AS retests
                  FROM sel_parts""").iloc[0]
    final = q("""SELECT count(*) FILTER (WHERE pass = 1) AS good, count(*) FILTER (WHERE pass IS NOT NULL) AS decided
                 FROM (SELECT DISTINCT ON (lot_key, part_id) lot_key, part_id, pass FROM sel_parts
                       ORDER BY lot_key, part_id, part_seq DESC) last_test""").iloc[0]
    index = q("""SELECT avg(test_t) FILTER (WHERE new_index) AS index_ms,
                        sum(test_t) FILTER (WHERE new_index) AS index_sum, count(*) AS timed
                 FROM (SELECT test_t, (lag(test_t) OVER w IS NULL OR test_t <> lag(test_t) OVER w
                                       OR site_num <= lag(site_num) OVER w) AS new_index
                       FROM sel_parts WHERE test_t IS NOT NULL
                       WINDOW w AS (PARTITION BY lot_key ORDER BY part_seq)) timed""").iloc[0]
    spans = q("""SELECT lot_key, max(end_t) - min(end_t) AS span, count(end_t) AS ends,
                        min(part_seq) FILTER (WHERE test_t IS NOT NULL) AS first_timed
                 FROM sel_parts GROUP BY lot_key""")
    first_t = q("""SELECT p.lot_key, p.test_t FROM sel_parts p JOIN
                     (SELECT lot_key, min(part_seq) AS seq FROM sel_parts WHERE test_t IS NOT NULL
                      GROUP BY lot_key) f ON p.lot_key = f.lot_key AND p.part_seq = f.seq""")
    lot_ids = q("SELECT DISTINCT lot_id FROM sel_parts")
    grade_counts = q("SELECT grade, count(*) AS n FROM sel_parts WHERE pass = 1 GROUP BY grade")
    hard = q("SELECT hard_bin AS bin, count(*) AS count FROM sel_parts GROUP BY hard_bin ORDER BY hard_bin")
    soft = q("SELECT soft_bin AS bin, count(*) AS count FROM sel_parts GROUP BY soft_bin ORDER BY soft_bin")
    failing = q("SELECT soft_bin AS bin, count(*) AS count FROM sel_parts WHERE pass IS DISTINCT FROM 1 "
                "GROUP BY soft_bin")
    names = q(f"""SELECT DISTINCT ON (b.kind, b.bin) b.kind, b.bin, b.name, b.passing
                  FROM bins b JOIN sel_lots s ON b.lot_key = s.lot_key
                  ORDER BY b.kind, b.bin, {lot_order('s')}""")
    sites = q("""SELECT site_num AS site, count(*) AS tested, count(*) FILTER (WHERE pass = 1) AS good,
                        count(*) FILTER (WHERE pass IS NOT NULL) AS decided
                 FROM sel_parts GROUP BY site_num ORDER BY site_num""")
    pct = ", ".join(f"percentile_cont({p / 100}) WITHIN GROUP (ORDER BY fin) AS p{p}" for p in PERCENTILES)
    stats = q(f"""SELECT param, region, min(units) AS units, count(*) AS count, count(fin) AS finite_count,
                         avg(fin) AS mean, stddev_samp(fin) AS sigma, min(fin) AS min, max(fin) AS max, {pct}
                  FROM sel_results GROUP BY param, region""", results=True,
              lot_keys=None if sel == Selection() else [int(k) for k in lots["lot_key"]])
    table, limit_hashes = first_limit_table(engine, sel)
    limits = table_limits(table) if table is not None else \
        pd.DataFrame(columns=["GRADE", "PARAM", "REGION", "LSL", "USL", "UNITS"])
    source = "no limit table in the store for these lots"
    if table is not None:
        first = lots.iloc[0]
        source = (f"limits.yaml of lot {first['lot_id']} on station {first['station']} "
                  f"(sha256 {str(limit_hashes['sha256'].iloc[0])[:12]}...)")
        if limit_hashes["sha256"].nunique() > 1:
            source += " (the lots were graded with different limit tables; the first one is used)"
    grade_order = [g.name for g in table.grades] if table is not None else []

    tested, good, failed = int(counts["tested"]), int(counts["good"]), int(counts["failed"])
    hours = _elapsed_hours(lots, spans, first_t)
    timed = int(index["timed"])
    overview: dict[str, float | int | str] = {
        "datalogs": len(lots),
        "lots": ", ".join(sorted(str(x) for x in lot_ids["lot_id"])),
        "parts tested": tested, "good": good, "failed": failed,
        "tester faults": tested - good - failed,
        "retests": int(counts["retests"]),
        "yield": good / (good + failed) if good + failed else float("nan"),
        "final yield": float(final["good"]) / float(final["decided"]) if int(final["decided"]) else float("nan"),
        "index time (ms)": float(index["index_ms"]) if timed else float("nan"),
        "tester time per part (ms)": float(index["index_sum"]) / timed if timed else float("nan"),
        "elapsed (h)": hours,
        "parts per hour": tested / hours if hours > 0 else float("nan"),
    }
    bin_names = {(str(r.kind), int(r.bin)): (str(r.name), bool(r.passing)) for r in names.itertuples()}
    stat_frame = _stats(stats)
    cpk = capability(stat_frame, limits)
    site_frame, site_test = site_table_from_counts(sites) if not sites.empty else \
        site_table_from_counts(pd.DataFrame({"site": [], "tested": [], "good": [], "decided": []}))
    summary = Summary(
        overview=overview,
        grades=_grades(grade_counts, grade_order, good + failed),
        hard_bins=_bins(hard, "hard", bin_names, tested),
        soft_bins=_bins(soft, "soft", bin_names, tested),
        pareto=_pareto(failing, bin_names, tested),
        sites=site_frame, site_test=site_test, stats=stat_frame, cpk=cpk,
        limits_source=source, grade_order=grade_order,
        notes=[f"from the {engine.name}: {sel.describe()}", *figure_notes(stat_frame, cpk)])
    if by is not None:
        summary.by = by
        summary.by_table = yield_by_sql(engine, sel, by, grade_order, shifts)
    return summary


def first_limit_table(engine: Engine, sel: Selection) -> tuple[LimitTable | None, pd.DataFrame]:
    """The first selected lot's limit table (lot_order), as the folder summary takes the first
    folder's; and (lot_key, sha256) of every selected lot."""
    hashes = query_selected(engine, sel, f"""SELECT s.lot_key, s.limits_sha256 AS sha256, f.content FROM sel_lots s
                                    LEFT JOIN applied_files f ON f.sha256 = s.limits_sha256
                                    ORDER BY {lot_order('s')}""")
    if hashes.empty or not isinstance(hashes["content"].iloc[0], str):
        return None, hashes
    return parse_limit_table(hashes["content"].iloc[0], "limits.yaml (from the store)"), hashes


def _elapsed_hours(lots: pd.DataFrame, spans: pd.DataFrame, first_t: pd.DataFrame) -> float:
    """As review.summary.elapsed_hours: each lot's start..end, else its parts' END_T span."""
    span = spans.set_index("lot_key")
    first = first_t.set_index("lot_key")["test_t"] if not first_t.empty else pd.Series(dtype=float)
    total = 0.0
    for lot in lots.itertuples():
        start, end = lot.start_t, lot.end_t
        if pd.notna(start) and pd.notna(end) and end > start:
            total += float(end - start)
            continue
        if lot.lot_key in span.index and int(span.loc[lot.lot_key, "ends"]) > 0:
            first_ms = float(first.get(lot.lot_key, 0.0)) if lot.lot_key in first.index else 0.0
            total += float(span.loc[lot.lot_key, "span"]) + first_ms / 1000.0
    return total / 3600.0


def _grades(counts: pd.DataFrame, grade_order: list[str], decided: int) -> pd.DataFrame:
    found = dict(zip(counts["grade"].astype(str), counts["n"].astype(int), strict=True))
    extra = sorted((g for g in found if g not in grade_order), key=lambda g: (-found[g], g))
    names = list(grade_order) + extra
    frame = pd.DataFrame({"grade": names, "parts": [found.get(g, 0) for g in names]})
    frame["share"] = frame["parts"] / decided if decided else np.nan
    return frame


def _bins(counts: pd.DataFrame, kind: str, names: dict, tested: int) -> pd.DataFrame:
    frame = pd.DataFrame({"bin": counts["bin"].astype(int), "count": counts["count"].astype(int)})
    frame["name"] = frame["bin"].map(lambda b: names.get((kind, int(b)), ("", False))[0])
    frame["pass"] = frame["bin"].map(lambda b: names.get((kind, int(b)), ("", False))[1])
    frame["share"] = frame["count"] / tested if tested else np.nan
    return frame[["bin", "name", "pass", "count", "share"]].reset_index(drop=True)


def _pareto(counts: pd.DataFrame, names: dict, tested: int) -> pd.DataFrame:
    frame = pd.DataFrame({"bin": counts["bin"].astype(int), "count": counts["count"].astype(int)})
    frame = frame.sort_values(["count", "bin"], ascending=[False, True], kind="stable").reset_index(drop=True)
    frame["name"] = frame["bin"].map(lambda b: names.get(("soft", int(b)), ("", False))[0])
    frame["share"] = frame["count"] / tested if tested else np.nan
    total = frame["count"].sum()
    frame["cumulative"] = frame["count"].cumsum() / total if total else np.nan
    return frame[["bin", "name", "count", "share", "cumulative"]]


def _stats(stats: pd.DataFrame) -> pd.DataFrame:
    if stats.empty:
        return pd.DataFrame(columns=STAT_COLUMNS)
    frame = stats.copy()
    frame["param"], frame["region"] = frame["param"].astype(str), frame["region"].astype(str)
    frame["count"] = frame["count"].astype(int)
    frame["over_range"] = frame["count"] - frame["finite_count"].astype(int)
    for column in ("mean", "sigma", "min", "max", *(f"p{p}" for p in PERCENTILES)):
        frame[column] = pd.to_numeric(frame[column], errors="coerce").astype(float)
    frame = frame.sort_values(["param", "region"], kind="stable").reset_index(drop=True)
    return frame[STAT_COLUMNS]


_BY_KEY = {"station": "station", "lot": "lot_id", "site": "site_num",
           "hour": "floor(coalesce(end_t, 0) / 3600.0)"}


def yield_by_sql(engine: Engine, sel: Selection, by: str, grade_order: list[str],
                 shifts: ShiftCalendar | None = None) -> pd.DataFrame:
    source, key, extra_ctes, extra = "sel_parts", "", "", []
    if by == "shift":
        # The shifts that overlap the selected parts, as a table of [t0, t1) windows.
        if shifts is None:
            raise ValueError("grouping by shift needs the floor's shift calendar")
        span = query_selected(engine, sel, "SELECT min(end_t) AS t0, max(end_t) AS t1 FROM sel_parts")
        t0, t1 = span["t0"].iloc[0], span["t1"].iloc[0]
        windows = shifts.windows_between(float(t0), float(t1)) if pd.notna(t0) and pd.notna(t1) else []
        rows = [(w.label, w.start_t, w.end_t) for w in windows] or [(NO_SHIFT, 0.0, 0.0)]
        extra_ctes = f""",
    windows AS (SELECT * FROM (VALUES {", ".join("(%s, %s, %s)" for _ in rows)}) AS w(label, t0, t1))"""
        extra = [v for row in rows for v in row]
        source = "sel_parts p LEFT JOIN windows w ON p.end_t >= w.t0 AND p.end_t < w.t1"
        key = f"coalesce(w.label, '{NO_SHIFT}')"     # a constant of ours, never input
    else:
        key = _BY_KEY[by]                  # one of the constants above, never input
    counts = query_selected(engine, sel, f"""{extra_ctes}
                                     SELECT {key} AS key, count(*) AS tested,
                                            count(*) FILTER (WHERE pass = 1) AS good,
                                            count(*) FILTER (WHERE pass = 0) AS failed
                                     FROM {source} GROUP BY {key}""", extra=extra)
    per_grade = query_selected(engine, sel, f"""{extra_ctes}
                                        SELECT {key} AS key, grade, count(*) AS n FROM {source}
                                        WHERE pass = 1 GROUP BY {key}, grade""", extra=extra)

    def label(value: object) -> str:
        if by == "site":
            return str(int(value))       # type: ignore[call-overload]
        if by == "hour":
            return datetime.fromtimestamp(float(value) * 3600.0, UTC).strftime("%Y-%m-%d %H:00")  # type: ignore[arg-type]
        return str(value)

    out = pd.DataFrame({"key": [label(k) for k in counts["key"]], "tested": counts["tested"].astype(int),
                        "good": counts["good"].astype(int), "failed": counts["failed"].astype(int)})
    out = out.sort_values("key", kind="stable").set_index("key")
    out["faults"] = out["tested"] - out["good"] - out["failed"]
    decided = out["good"] + out["failed"]
    out["yield"] = out["good"] / decided.where(decided > 0)
    grades = pd.DataFrame({"key": [label(k) for k in per_grade["key"]], "grade": per_grade["grade"].astype(str),
                           "n": per_grade["n"].astype(int)})
    table = grades.pivot_table(index="key", columns="grade", values="n", aggfunc="sum", fill_value=0)
    for grade in grade_order:
        column = table[grade] if grade in table else pd.Series(0, index=out.index)
        out[f"yield {grade}"] = column.reindex(out.index, fill_value=0) / decided.where(decided > 0)
    out.index.name = by
    return out.reset_index()

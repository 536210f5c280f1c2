"""The HTML report's plots from the store or Parquet history, counted in the database.

station/review/report.py draws what `ReportData` holds. From folders it has every row; here the
database does the counting: each histogram's bars are a GROUP BY over the results (the bars'
edges from the summary's min and max, as numpy.histogram takes them), and the Vos-versus-VCM
curves are the raw sweep rows of a sample of parts chosen by a hash of their keys (the same
sample every time). Only the counts, the sample and the lot headers travel.
"""

from __future__ import annotations

import json

import numpy as np
import pandas as pd

from station.config.parameters import LIMITABLE
from station.review.limits import table_limits
from station.review.plots import histogram_bin_count
from station.review.report import CURVE_SAMPLE, ReportData, region_ranges
from station.review.summary import Summary
from station.store.summary_sql import (
    Engine,
    Selection,
    first_limit_table,
    lot_order,
    query_selected,
    yield_by_sql,
)

SWEEP_PARAM = "vos_cm"          # the raw sweep points the curves draw


def report_data_sql(engine: Engine, sel: Selection, summary: Summary, source: str) -> ReportData:
    table, _ = first_limit_table(engine, sel)
    lots = _headers(engine, sel)
    counts, curve_parts = _histograms(engine, sel, summary), 0
    curves: dict[int, tuple[np.ndarray, np.ndarray]] = {}
    if not summary.stats.empty:
        curves, curve_parts = _curves(engine, sel)
    limits = table_limits(table) if table is not None else \
        pd.DataFrame(columns=["GRADE", "PARAM", "REGION", "LSL", "USL", "UNITS"])
    return ReportData(
        lots=lots, source=source, hour_table=yield_by_sql(engine, sel, "hour", summary.grade_order),
        limits=limits, histograms=counts, curves=curves, curve_parts=curve_parts,
        regions=region_ranges(table, lots[0].get("span_v") if lots else None))


def _headers(engine: Engine, sel: Selection) -> list[dict]:
    frame = query_selected(engine, sel, f"""SELECT h.header FROM ({engine.headers}) h
                                            JOIN sel_lots s ON h.lot_key = s.lot_key
                                            ORDER BY {lot_order('s')}""")
    lots = []
    for text in frame["header"]:
        try:
            lots.append(json.loads(text) if isinstance(text, str) else {})
        except json.JSONDecodeError:
            lots.append({})
    return lots


def _histograms(engine: Engine, sel: Selection, summary: Summary) -> dict[tuple[str, str], tuple[np.ndarray, np.ndarray]]:
    """(param, region) -> (counts, edges) for each limitable figure with finite results."""
    shapes: dict[tuple[str, str], tuple[float, float, int, int]] = {}
    for stat in summary.stats.itertuples():
        finite = int(stat.count) - int(stat.over_range)
        if stat.param in LIMITABLE and finite > 0:
            shapes[(str(stat.param), str(stat.region))] = (float(stat.min), float(stat.max),
                                                         histogram_bin_count(finite), finite)
    out: dict[tuple[str, str], tuple[np.ndarray, np.ndarray]] = {}
    spread = {key: shape for key, shape in shapes.items() if shape[1] > shape[0]}
    for key, (lo, hi, n, finite) in shapes.items():
        if key not in spread:      # one value only: numpy puts it in the middle of lo-0.5 .. hi+0.5
            edges = np.linspace(lo - 0.5, hi + 0.5, n + 1)
            out[key] = (np.histogram(np.full(finite, lo), edges)[0], edges)
    if not spread:
        return out
    rows = ", ".join("(%s, %s, %s, %s, %s)" for _ in spread)
    values = [v for (param, region), (lo, hi, n, _) in spread.items() for v in (param, region, lo, hi, n)]
    lot_keys = None if sel == Selection() else [int(k) for k in query_selected(engine, sel, "SELECT lot_key FROM sel_lots")
                                               ["lot_key"]]
    frame = query_selected(engine, sel, f""",
        edges AS (SELECT * FROM (VALUES {rows}) AS e(param, region, lo, hi, n))
        SELECT r.param, r.region,
               LEAST(e.n - 1, CAST(floor((r.fin - e.lo) / (e.hi - e.lo) * e.n) AS INTEGER)) AS bar,
               count(*) AS parts
        FROM sel_results r JOIN edges e ON r.param = e.param AND r.region = e.region
        WHERE r.fin IS NOT NULL GROUP BY 1, 2, 3""", results=True, extra=values, lot_keys=lot_keys)
    for (param, region), (lo, hi, n, _) in spread.items():
        counts = np.zeros(n, dtype=int)
        mine = frame[(frame["param"] == param) & (frame["region"] == region)]
        np.add.at(counts, mine["bar"].astype(int).to_numpy(), mine["parts"].astype(int).to_numpy())
        out[(param, region)] = (counts, np.linspace(lo, hi, n + 1))
    return out


def _curves(engine: Engine, sel: Selection) -> tuple[dict[int, tuple[np.ndarray, np.ndarray]], int]:
    swept = """EXISTS (SELECT 1 FROM results r WHERE r.lot_key = p.lot_key AND r.part_seq = p.part_seq
                       AND r.param = %s)"""
    total = query_selected(engine, sel, f"SELECT count(*) AS n FROM sel_parts p WHERE {swept}", extra=[SWEEP_PARAM])
    rows = query_selected(engine, sel, f""",
        sample AS (SELECT p.lot_key, p.part_seq FROM sel_parts p WHERE {swept}
                   ORDER BY md5(CAST(p.lot_key AS VARCHAR) || ':' || CAST(p.part_seq AS VARCHAR)) LIMIT %s)
        SELECT r.lot_key, r.part_seq, r.vcm, r.result FROM results r
        JOIN sample s ON r.lot_key = s.lot_key AND r.part_seq = s.part_seq
        WHERE r.param = %s ORDER BY r.lot_key, r.part_seq, r.test_num""",
                  extra=[SWEEP_PARAM, CURVE_SAMPLE, SWEEP_PARAM])
    curves = {}
    for number, (_, group) in enumerate(rows.groupby(["lot_key", "part_seq"], sort=True)):
        curves[number] = (group["vcm"].astype(float).to_numpy(), group["result"].astype(float).to_numpy())
    return curves, int(total["n"].iloc[0])

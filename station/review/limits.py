"""The limits in force for a datalog, as a flat frame for capability and plots.

Preferred source: the datalog's own limits.yaml (every grade, even one no part took).
Fallback: the LO_LIMIT/HI_LIMIT columns of results.csv, which carry the limits of the grade
that decided each part (so only grades some part was decided by appear).
"""

from __future__ import annotations

from pathlib import Path

import numpy as np
import pandas as pd

from station.config.files import ConfigError
from station.config.limit_tables import LimitTable, load_limit_table
from station.review.load import Datalogs, computed_rows

LIMIT_COLUMNS = ["GRADE", "PARAM", "REGION", "LSL", "USL", "UNITS"]


def table_limits(table: LimitTable) -> pd.DataFrame:
    """One row per grade, parameter and region of a limit table (best grade first)."""
    rows = [(g.name, lim.param, lim.region or "",
             np.nan if lim.low is None else lim.low, np.nan if lim.high is None else lim.high, lim.units)
            for g in table.grades for lim in g.limits]
    return pd.DataFrame(rows, columns=LIMIT_COLUMNS)


def logged_limits(results: pd.DataFrame) -> pd.DataFrame:
    """Limits as logged in LO_LIMIT/HI_LIMIT, per grade that decided at least one part."""
    rows = computed_rows(results)
    rows = rows[rows["LO_LIMIT"].notna() | rows["HI_LIMIT"].notna()]
    if rows.empty:
        return pd.DataFrame(columns=LIMIT_COLUMNS)
    keys = [rows["GRADE"].astype(str), rows["PARAM"].astype(str), rows["REGION"].astype(str)]
    grouped = rows.groupby(keys, sort=False)
    frame = grouped.agg(LSL=("LO_LIMIT", "first"), USL=("HI_LIMIT", "first"), UNITS=("UNITS", "first"))
    frame.index.names = ["GRADE", "PARAM", "REGION"]
    frame = frame.reset_index()
    frame["UNITS"] = frame["UNITS"].astype(str)
    return frame.sort_values(["GRADE"], kind="stable").reset_index(drop=True)[LIMIT_COLUMNS]


def datalog_table(logs: Datalogs, index: int = 0) -> LimitTable | None:
    """The limit table a datalog was graded with (its limits.yaml), or None if unreadable."""
    path: Path | None = logs.limits_files[index]
    if path is None:
        return None
    try:
        return load_limit_table(path)
    except ConfigError:
        return None


def limits_in_force(logs: Datalogs) -> tuple[pd.DataFrame, str, LimitTable | None]:
    """(limits frame, where they came from in words, the table if one was read)."""
    table = datalog_table(logs, 0)
    hashes = {(lot.get("limits") or {}).get("sha256") for lot in logs.lots}
    mixed = " (the datalogs were graded with different limit tables; the first one is used)" \
        if len(hashes) > 1 else ""
    if table is not None:
        return table_limits(table), f"{logs.limits_files[0]}{mixed}", table
    frame = logged_limits(logs.results)
    return frame, "LO_LIMIT/HI_LIMIT columns of results.csv (limits.yaml missing or unreadable)", None

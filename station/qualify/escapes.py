"""Escapes against the simulator's truth: parts sorted to a grade whose true figures break
that grade's specification limits. A dry run's sim_truth.csv knows the true figures, so
`station rebin` of a dry run can say what a guard-banded table saves.

Only the figures the truth file holds directly are judged: Vos (the low pair's offset, what
the station measures at mid common mode), Iq, CMRR of the low and high regions (the true
slope of each input pair) and PSRR. The spec limits are the new table's (its spec_low /
spec_high where guard-banded), so both sorts are judged against the same specification.
"""

from __future__ import annotations

import math

import pandas as pd

from station.config.limit_tables import LimitTable

TRUTH_OF: dict[tuple[str, str | None], str] = {
    ("vos", None): "VOS_LOW_V", ("iq", None): "IQ_A", ("cmrr", "low"): "CMRR_LOW_DB",
    ("cmrr", "high"): "CMRR_HIGH_DB", ("psrr", None): "PSRR_DB",
}


def true_grade_breaks(truth: pd.DataFrame, spec_table: LimitTable) -> dict[str, set[str]]:
    """grade -> ids of parts whose true figures break one of the grade's spec limits."""
    rows = truth.set_index("PART_ID")
    out: dict[str, set[str]] = {}
    for grade in spec_table.grades:
        broken: set[str] = set()
        for limit in grade.limits:
            column = TRUTH_OF.get((limit.param, limit.region))
            if column is None or column not in rows:
                continue
            low, high = limit.spec
            values = pd.to_numeric(rows[column], errors="coerce")
            for pid, value in values.items():
                if value is None or math.isnan(value):
                    continue
                if (low is not None and value < low) or (high is not None and value > high):
                    broken.add(str(pid))
        out[grade.name] = broken
    return out


def escapes(parts: pd.DataFrame, breaks: dict[str, set[str]]) -> dict[str, int]:
    """grade -> parts of that grade (last row of each id) that truly break its spec."""
    last = parts.drop_duplicates("PART_ID", keep="last")
    good = last[last["PASS"] == 1]
    return {grade: int(good[(good["GRADE"] == grade) & good["PART_ID"].isin(ids)].shape[0])
            for grade, ids in breaks.items()}

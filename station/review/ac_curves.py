"""CMRR versus frequency per grade, from the datalog's cmrr_ac rows: for each grade (parts that
took no grade as "no grade") and frequency point, the 10th, 50th and 90th percentile of the
parts' CMRR and how many parts gave one. The report draws it with each grade's limits."""

from __future__ import annotations

import numpy as np
import pandas as pd

from station.judge.ac_rejection import label_frequency

NO_GRADE = "no grade"
COLUMNS = ["GRADE", "FREQ_HZ", "P10", "P50", "P90", "PARTS"]


def cmrr_by_frequency(results: pd.DataFrame, parts: pd.DataFrame) -> pd.DataFrame:
    """One row per (grade, frequency point), low to high in frequency; empty without cmrr_ac rows."""
    rows = results[results["PARAM"] == "cmrr_ac"]
    if rows.empty:
        return pd.DataFrame(columns=COLUMNS)
    grade_of = parts.set_index("PART_SEQ")["GRADE"].astype(str).replace({"nan": NO_GRADE, "": NO_GRADE})
    frame = pd.DataFrame({"GRADE": rows["PART_SEQ"].map(grade_of).fillna(NO_GRADE).to_numpy(),
                          "FREQ_HZ": [label_frequency(r) for r in rows["REGION"]],
                          "RESULT": rows["RESULT"].to_numpy(dtype=float)})
    frame = frame[np.isfinite(frame["RESULT"])]
    out = [{"GRADE": grade, "FREQ_HZ": hz, "P10": float(np.percentile(g["RESULT"], 10)),
            "P50": float(np.median(g["RESULT"])), "P90": float(np.percentile(g["RESULT"], 90)), "PARTS": len(g)}
           for (grade, hz), g in frame.groupby(["GRADE", "FREQ_HZ"])]
    return pd.DataFrame(out, columns=COLUMNS).sort_values(["GRADE", "FREQ_HZ"]).reset_index(drop=True)

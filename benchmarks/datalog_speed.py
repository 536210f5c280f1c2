"""Datalog throughput: rows per second through station.datalog.writer.DatalogWriter, and the time to
summarise a 1,000,000-row datalog with the review summary (station/review_summary).

The big datalog is a real dry-run datalog repeated with new part ids (same rows, same
columns, same lot.json and limits), so the summary sees what a long shift would give it.
"""

from __future__ import annotations

import shutil
import time
from pathlib import Path

import pandas as pd

from station.config.test_catalog import TestDef
from station.datalog.writer import DatalogWriter, PartRecord, ResultRow

ROWS_PER_PART = 40  # about what the demo sequence logs per good part


def writer_rows_per_s(folder: Path, parts: int, source: Path) -> float:
    """Write `parts` parts of ROWS_PER_PART rows; rows per second, fsync per part included."""
    tests = [TestDef(1000 + k, f"Vos point {k}", "vos_cm", None, 0.1 * k) for k in range(ROWS_PER_PART)]
    writer = DatalogWriter(folder, force=True)
    writer.start({"lot_id": "SPEED", "station": "bench"}, {"sequence": source, "limits": source, "bench": source})
    start = time.perf_counter()
    for n in range(parts):
        rows = [ResultRow(t, 1e-6 * (n % 97) + 1e-9 * i) for i, t in enumerate(tests)]
        writer.write_part(PartRecord(f"P{n:07d}", n % 4 + 1, 1, 1, "A", True, 250, end_t=time.time()), rows)
    elapsed = time.perf_counter() - start
    writer.finish({"complete": True, "parts_tested": parts})
    return parts * ROWS_PER_PART / elapsed


def grow_datalog(source: Path, target: Path, rows: int) -> int:
    """Copy the datalog `source` into `target`, repeating its parts until it holds `rows` result
    rows; the number of result rows written."""
    results = pd.read_csv(source / "results.csv", dtype=str, keep_default_na=False)
    parts = pd.read_csv(source / "parts.csv", dtype=str, keep_default_na=False)
    copies = -(-rows // len(results))
    big_results = pd.concat([results.assign(PART_ID=results["PART_ID"] + f"-{k}") for k in range(copies)],
                            ignore_index=True).iloc[:rows]
    big_parts = pd.concat([parts.assign(PART_ID=parts["PART_ID"] + f"-{k}") for k in range(copies)],
                          ignore_index=True)
    big_parts = big_parts[big_parts["PART_ID"].isin(set(big_results["PART_ID"]))]
    if target.exists():
        shutil.rmtree(target)
    target.mkdir(parents=True)
    for name in ("lot.json", "sequence.yaml", "limits.yaml", "bench.yaml"):
        if (source / name).exists():
            shutil.copy(source / name, target / name)
    big_results.to_csv(target / "results.csv", index=False)
    big_parts.to_csv(target / "parts.csv", index=False)
    return len(big_results)


def summary_seconds(folder: Path) -> tuple[float, float]:
    """(load + summarise, summarise alone) in seconds, with the review helper's code."""
    from station.review.load import load_datalogs
    from station.review.summary import summarise

    start = time.perf_counter()
    logs = load_datalogs([folder])
    loaded = time.perf_counter()
    summarise(logs)
    done = time.perf_counter()
    return done - start, done - loaded

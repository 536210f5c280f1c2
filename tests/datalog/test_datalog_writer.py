"""The datalog writer: columns, exact numbers, whole parts on disk, no silent overwrite."""

from __future__ import annotations

import json
import math

import pandas as pd
import pytest

from station.config.test_catalog import TestDef
from station.datalog.writer import (
    PART_COLUMNS,
    RESULT_COLUMNS,
    DatalogError,
    DatalogWriter,
    PartRecord,
    ResultRow,
    sha256_of,
)


def _start(tmp_path, **kwargs) -> DatalogWriter:
    source = tmp_path / "src.yaml"
    source.write_text("a: 1\n")
    writer = DatalogWriter(tmp_path / "lot", **kwargs)
    writer.start({"lot_id": "L1", "station": "s"}, {"sequence": source, "limits": source, "bench": source})
    return writer


def test_rows_are_on_disk_after_each_part_and_read_back_exactly(tmp_path) -> None:
    writer = _start(tmp_path)
    vos = TestDef(2001, "Vos at nominal supply", "vos", None, 0.0)
    raw = TestDef(3101, "Vos at VCM -5.100 V", "vos_cm", "low", -5.1)
    writer.write_part(PartRecord("D00001", 2, 1, 1, "A", True, 812, end_t=1.5),
                      [ResultRow(raw, 1.2345678901234e-05), ResultRow(vos, -3.3e-06, -5e-05, 5e-05, True, "A")])
    writer.write_part(PartRecord("D00002", 1, 9, 90, None, None, 100, fault="dmm1: timeout"),
                      [ResultRow(raw, math.inf)])
    # Before finish(): a crash here must still leave both parts readable.
    results = pd.read_csv(tmp_path / "lot" / "results.csv")
    parts = pd.read_csv(tmp_path / "lot" / "parts.csv", keep_default_na=False)
    assert list(results.columns) == RESULT_COLUMNS
    assert list(parts.columns) == PART_COLUMNS
    # repr round-trips exactly (Python's float repr is the shortest string that reads back to
    # the same double; Python documentation, from memory)
    assert results["RESULT"].iloc[0] == 1.2345678901234e-05
    assert math.isinf(results["RESULT"].iloc[2])
    assert results["PASS"].iloc[1] == 1 and pd.isna(results["PASS"].iloc[0])
    assert parts["PASS"].tolist() == ["1", ""]  # empty: tester fault, no pass/fail indication
    assert parts["FAULT"].iloc[1] == "dmm1: timeout"
    header = json.loads((tmp_path / "lot" / "lot.json").read_text())
    assert header["complete"] is False
    assert header["sequence"]["sha256"] == sha256_of(tmp_path / "lot" / "sequence.yaml")
    writer.finish({"parts_tested": 2})
    header = json.loads((tmp_path / "lot" / "lot.json").read_text())
    assert header["parts_tested"] == 2 and "end_time" in header


def test_existing_datalog_is_not_overwritten_without_force(tmp_path) -> None:
    _start(tmp_path).finish({})
    with pytest.raises(DatalogError, match="already holds a datalog"):
        DatalogWriter(tmp_path / "lot")
    _start(tmp_path, force=True).finish({})


def test_an_index_is_committed_with_two_syncs_results_first(tmp_path, monkeypatch) -> None:
    import station.datalog.folder as folder

    writer = _start(tmp_path)
    vos = TestDef(2001, "Vos at nominal supply", "vos", None, 0.0)
    synced: list[int] = []
    real_fsync = folder.os.fsync
    monkeypatch.setattr(folder.os, "fsync", lambda fd: (synced.append(fd), real_fsync(fd))[1])
    index = [(PartRecord(f"D{k}", k, 1, 1, "A", True, 800, end_t=1.0), [ResultRow(vos, 1e-6 * k)])
             for k in range(1, 5)]
    writer.write_parts(index)
    assert synced == [writer._results.fileno(), writer._parts.fileno()]  # results durable first
    parts = pd.read_csv(tmp_path / "lot" / "parts.csv")
    results = pd.read_csv(tmp_path / "lot" / "results.csv")
    assert list(parts["PART_ID"]) == ["D1", "D2", "D3", "D4"] and list(parts["SITE_NUM"]) == [1, 2, 3, 4]
    assert list(results["RESULT"]) == [1e-6, 2e-6, 3e-6, 4e-6]
    assert writer.part_rows == 4 and writer.result_rows == 4

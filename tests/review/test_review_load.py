"""Reading datalog folders: tables, part matching, and one-line errors for non-datalogs."""

from __future__ import annotations

import json
from pathlib import Path

import numpy as np
import pandas as pd
import pytest

from station.review.load import DatalogError, load_datalogs  # noqa: E402
from tests.support.review_datalogs import LotSpec, make_datalog  # noqa: E402


@pytest.fixture(scope="module")
def folder(tmp_path_factory) -> Path:
    return make_datalog(tmp_path_factory.mktemp("load") / "lot", LotSpec(parts=120, sites=3, seed=5))


def test_tables_match_the_csv_files(folder: Path) -> None:
    logs = load_datalogs([folder])
    # Independent reference: pandas reading the files with no dtypes given.
    parts = pd.read_csv(folder / "parts.csv")
    results = pd.read_csv(folder / "results.csv")
    assert len(logs.parts) == len(parts)
    assert len(logs.results) == len(results)
    assert logs.parts["HARD_BIN"].tolist() == parts["HARD_BIN"].tolist()
    assert logs.results["RESULT"].to_numpy() == pytest.approx(results["RESULT"].to_numpy(), nan_ok=True)


def test_every_cell_reads_as_pythons_own_parse_of_its_text(folder: Path) -> None:
    """The multi-threaded reader against the row-by-row path: each number is Python's float()
    or int() of the cell's text (correctly rounded, Python documentation), bit for bit; an empty
    cell is NaN only where the format lets it be empty; text stays text ("" stays "")."""
    from station.datalog.folder import read_rows
    from station.review.load import _PART_EMPTY, _RESULT_EMPTY, PART_DTYPES, RESULT_DTYPES

    logs = load_datalogs([folder])
    for name, table, dtypes, empty in (("parts.csv", logs.parts, PART_DTYPES, _PART_EMPTY),
                                       ("results.csv", logs.results, RESULT_DTYPES, _RESULT_EMPTY)):
        rows, _ = read_rows(folder / name)
        header = pd.read_csv(folder / name, nrows=0).columns.tolist()
        for index, column in enumerate(header):
            cells = [row[index] for row in rows]
            read = table[column].tolist()
            if dtypes[column] == "float64":
                expected = [float(c) if c or column not in empty else float("nan") for c in cells]
                assert np.array_equal(np.array(read), np.array(expected), equal_nan=True), column
            elif str(dtypes[column]).startswith("int"):
                assert read == [int(c) for c in cells], column
            else:
                assert [str(v) for v in read] == cells, column


def test_an_empty_number_where_the_format_forbids_it_is_named_with_its_line(folder: Path, tmp_path: Path) -> None:
    copy = tmp_path / "emptied"
    copy.mkdir()
    for name in ("lot.json", "parts.csv", "results.csv"):
        (copy / name).write_bytes((folder / name).read_bytes())
    lines = (copy / "results.csv").read_text().splitlines(keepends=True)
    header = lines[0].strip().split(",")
    cells = lines[5].rstrip("\n").split(",")
    cells[header.index("TEST_NUM")] = ""
    lines[5] = ",".join(cells) + "\n"
    (copy / "results.csv").write_text("".join(lines))
    with pytest.raises(DatalogError) as caught:
        load_datalogs([copy])
    assert "results.csv:6: TEST_NUM" in str(caught.value)


def test_every_result_row_maps_to_its_part_row_even_for_retests(folder: Path) -> None:
    logs = load_datalogs([folder])
    merged = logs.results.merge(logs.parts[["PART_SEQ", "PART_ID", "SITE_NUM", "RETEST"]], on="PART_SEQ",
                                suffixes=("", "_part"))
    assert len(merged) == len(logs.results)
    assert (merged["PART_ID"] == merged["PART_ID_part"]).all()
    assert (merged["SITE_NUM"] == merged["SITE_NUM_part"]).all()
    # A retested id has two part rows, each with its own block of results.
    retested = logs.parts[logs.parts["RETEST"] == 1]
    assert len(retested) > 0
    for part_id in retested["PART_ID"]:
        rows = logs.parts[logs.parts["PART_ID"] == part_id]
        with_results = rows[rows["PASS"].notna()]
        seqs = set(logs.results.loc[logs.results["PART_ID"] == part_id, "PART_SEQ"])
        assert seqs == set(with_results["PART_SEQ"])


def test_tester_faults_have_no_rows(folder: Path) -> None:
    logs = load_datalogs([folder])
    faults = logs.parts.loc[logs.parts["PASS"].isna(), "PART_SEQ"]
    assert len(faults) == 3
    assert not logs.results["PART_SEQ"].isin(faults).any()


def test_several_folders_get_distinct_part_numbers(folder: Path, tmp_path: Path) -> None:
    other = make_datalog(tmp_path / "two", LotSpec(parts=40, sites=2, seed=9, lot_id="LOT-T2"))
    logs = load_datalogs([folder, other])
    assert logs.parts["PART_SEQ"].is_unique
    assert set(logs.parts["DATALOG"]) == {0, 1}
    assert set(logs.results.loc[logs.results["DATALOG"] == 1, "LOT_ID"].astype(str)) == {"LOT-T2"}


def test_a_folder_that_is_not_a_datalog_is_refused_in_one_line(tmp_path: Path) -> None:
    with pytest.raises(DatalogError, match="not a datalog folder: lot.json, parts.csv, results.csv missing"):
        load_datalogs([tmp_path])
    with pytest.raises(DatalogError, match="not a folder"):
        load_datalogs([tmp_path / "nowhere"])


def test_wrong_header_format_and_missing_columns_are_named(folder: Path, tmp_path: Path) -> None:
    bad = tmp_path / "bad"
    bad.mkdir()
    for name in ("parts.csv", "results.csv"):
        (bad / name).write_bytes((folder / name).read_bytes())
    (bad / "lot.json").write_text(json.dumps({"format": "something-else"}))
    with pytest.raises(DatalogError, match="not a datalog header"):
        load_datalogs([bad])
    lot = json.loads((folder / "lot.json").read_text())
    (bad / "lot.json").write_text(json.dumps(lot))
    text = (folder / "parts.csv").read_text().replace("SOFT_BIN", "SOFTBIN", 1)
    (bad / "parts.csv").write_text(text)
    with pytest.raises(DatalogError, match="columns missing: SOFT_BIN"):
        load_datalogs([bad])

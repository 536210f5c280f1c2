"""Read datalog folders (docs/datalog-format.md) into pandas, for the review tools.

The datalog is the only thing the review tools read. A folder that is not a datalog is
refused with one line that says what is missing. Several folders load into one pair of
tables with a DATALOG column (the folder's index) so that a shift of lots summarises at once.
"""

from __future__ import annotations

import csv
from collections.abc import Callable, Sequence
from dataclasses import dataclass, field
from pathlib import Path

import numpy as np
import pandas as pd
import pyarrow as pa
import pyarrow.csv as pa_csv

from station.datalog.folder import (
    DatalogError,
    columns_of,
    format_version,
    read_lot_header,
    read_rows,
)
from station.datalog.folder import match_results_to_parts as match_rows

# Explicit dtypes: no type sniffing (slow, and a numeric-looking PART_ID must stay text).
RESULT_DTYPES: dict[str, object] = {
    "LOT_ID": "category", "PART_ID": "str", "HEAD_NUM": "int16", "SITE_NUM": "int16",
    "TEST_NUM": "int32", "TEST_TXT": "category", "PARAM": "category", "REGION": "category",
    "VCM": "float64", "COND": "float64", "RESULT": "float64", "UNITS": "category",
    "LO_LIMIT": "float64", "HI_LIMIT": "float64", "PASS": "float64", "GRADE": "category",
    "PAT_LO": "float64", "PAT_HI": "float64",
}
PART_DTYPES: dict[str, object] = {
    "LOT_ID": "str", "PART_ID": "str", "HEAD_NUM": "int16", "SITE_NUM": "int16",
    "HARD_BIN": "int32", "SOFT_BIN": "int32", "GRADE": "str", "PASS": "float64",
    "TEST_T": "float64", "RETEST": "int8", "FAIL_TEST": "float64", "FAULT": "str",
    "END_T": "float64", "RESCREEN": "float64",
}
# Only these columns may be empty and mean "none"; text columns keep "" as "".
_RESULT_EMPTY = {c: [""] for c in ("VCM", "COND", "LO_LIMIT", "HI_LIMIT", "PASS", "PAT_LO", "PAT_HI")}
_PART_EMPTY = {c: [""] for c in ("PASS", "FAIL_TEST", "TEST_T", "END_T", "RESCREEN")}

# Raw sweep points (not computed figures); summaries leave them out.
RAW_PARAMS = frozenset({"vos_cm", "vos_force", "vos_span"})


@dataclass
class Datalogs:
    """One or more datalog folders read into two tables.

    `parts`: parts.csv rows plus DATALOG (folder index) and PART_SEQ (unique row number).
    `results`: results.csv rows plus DATALOG and PART_SEQ (the part row they belong to).
    """

    folders: list[Path]
    lots: list[dict]
    parts: pd.DataFrame
    results: pd.DataFrame
    limits_files: list[Path | None]
    warnings: list[str] = field(default_factory=list)

    def bin_names(self, kind: str) -> dict[int, str]:
        """Bin number -> name from every lot.json (`kind` "hard_bins" or "soft_bins")."""
        names: dict[int, str] = {}
        for lot in self.lots:
            for number, info in (lot.get(kind) or {}).items():
                names.setdefault(int(number), str(info.get("name", "")))
        return names

    def bin_passing(self, kind: str) -> dict[int, bool]:
        flags: dict[int, bool] = {}
        for lot in self.lots:
            for number, info in (lot.get(kind) or {}).items():
                flags.setdefault(int(number), bool(info.get("pass", False)))
        return flags


def load_datalogs(folders: Sequence[str | Path],
                  progress: Callable[[Path], None] | None = None) -> Datalogs:
    """Read every folder (in order); `progress` is called after each one."""
    if not folders:
        raise DatalogError("no datalog folder given")
    lots: list = []
    parts_list: list = []
    results_list: list = []
    limits: list = []
    warnings: list[str] = []
    offset = 0
    for index, folder in enumerate(Path(f) for f in folders):
        lot, parts, results, notes = read_datalog_folder(folder)
        parts.insert(0, "DATALOG", np.int32(index))
        results.insert(0, "DATALOG", np.int32(index))
        parts["PART_SEQ"] += offset
        results["PART_SEQ"] += offset
        offset += len(parts)
        lots.append(lot)
        parts_list.append(parts)
        results_list.append(results)
        limits_file = folder / str((lot.get("limits") or {}).get("file", "limits.yaml"))
        limits.append(limits_file if limits_file.is_file() else None)
        warnings.extend(f"{folder}: {note}" for note in notes)
        if progress is not None:
            progress(folder)
    parts = pd.concat(parts_list, ignore_index=True) if len(parts_list) > 1 else parts_list[0]
    results = _concat_results(results_list)
    return Datalogs([Path(f) for f in folders], lots, parts, results, limits, warnings)


def read_datalog_folder(folder: Path) -> tuple[dict, pd.DataFrame, pd.DataFrame, list[str]]:
    """(lot header, parts, results, warnings) of one folder; DatalogError if it is not one."""
    if not folder.is_dir():
        raise DatalogError(f"{folder}: not a folder (give a datalog folder written with --out)")
    missing = [name for name in ("lot.json", "parts.csv", "results.csv") if not (folder / name).is_file()]
    if missing:
        raise DatalogError(f"{folder}: not a datalog folder: {', '.join(missing)} missing "
                           "(a datalog holds lot.json, parts.csv and results.csv)")
    lot = read_lot_header(folder)
    version = format_version(lot)
    parts = _read_csv(folder / "parts.csv", PART_DTYPES, _PART_EMPTY, version)
    results = _read_csv(folder / "results.csv", RESULT_DTYPES, _RESULT_EMPTY, version)
    notes = []
    if not lot.get("complete", False):
        notes.append("lot.json says the lot is not complete (still running, or it stopped early)")
    parts = parts.reset_index(drop=True)
    parts["PART_SEQ"] = np.arange(len(parts), dtype=np.int64)
    results["PART_SEQ"] = match_results_to_parts(results, parts)
    orphans = int((results["PART_SEQ"] < 0).sum())
    if orphans:
        notes.append(f"{orphans} result rows belong to no row of parts.csv; left out")
        results = results[results["PART_SEQ"] >= 0].reset_index(drop=True)
    return lot, parts, results, notes


def match_results_to_parts(results: pd.DataFrame, parts: pd.DataFrame) -> np.ndarray:
    """PART_SEQ of each result row (-1 where no part row matches), by the datalog format's one
    matching rule (station/datalog/folder.py: match_results_to_parts)."""
    if results.empty or parts.empty:
        return np.full(len(results), -1, dtype=np.int64)
    position = match_rows(results["PART_ID"], results["SITE_NUM"], results["TEST_NUM"].to_numpy(),
                          parts["PART_ID"], parts["SITE_NUM"], parts["PASS"].notna().to_numpy())
    return np.where(position >= 0, parts["PART_SEQ"].to_numpy()[np.maximum(position, 0)], -1)


def _read_csv(path: Path, dtypes: dict[str, object], empty: dict[str, list[str]], version: int) -> pd.DataFrame:
    """pyarrow's multi-threaded reader; when it objects, or a cell that may not be empty is,
    the format's row-by-row check (station.datalog.folder.read_rows) names the file, line and
    column that are wrong. A folder of an earlier format version gets the later columns,
    empty (NaN)."""
    if _torn(path):
        read_rows(path, version=version)   # raises: torn last line, with its line number
    header = _header(path)
    wanted = columns_of(path.name, version)
    missing = [c for c in wanted if c not in header]
    if missing:
        raise DatalogError(f"{path}: columns missing: {', '.join(missing)} (see docs/datalog-format.md)")
    if header != wanted:        # another version's columns than lot.json names
        read_rows(path, version=version)
    types = {c: _ARROW_TYPES[str(t)] for c, t in dtypes.items() if c in wanted}
    try:
        # 4 MB blocks (pyarrow's default is 1 MB): a few dozen chunks per million rows, which
        # become pandas columns several times faster than a hundred.
        table = pa_csv.read_csv(path, read_options=pa_csv.ReadOptions(block_size=1 << 22),
                                convert_options=pa_csv.ConvertOptions(
            column_types=types, null_values=[""], strings_can_be_null=False,
            quoted_strings_can_be_null=False))
    except (pa.ArrowInvalid, OSError) as exc:
        read_rows(path, version=version)   # raises with the row, if the row check sees it
        raise DatalogError(f"{path}: a value does not fit its column: {str(exc).splitlines()[0]}") from None
    # Empty means "none" only in the columns of `empty`; elsewhere an empty number is damage
    # (a row cut short, or a cell lost), which the row check names with its line.
    damaged = [c for c in wanted if c not in empty and table.column(c).null_count]
    if damaged:
        read_rows(path, version=version)
        raise DatalogError(f"{path}: a row has no {damaged[0]} (the file is damaged)")
    # One block per column, the arrow buffers released as they convert: less copying and a
    # lower peak.
    frame = table.to_pandas(split_blocks=True, self_destruct=True)
    del table
    for column, dtype in dtypes.items():
        if column not in frame:    # columns of a later version than the folder's
            frame[column] = pd.Series(np.nan, index=frame.index, dtype=dtype)
        elif dtype == "category":  # sorted categories, as the rest of the review tools expect
            frame[column] = frame[column].cat.reorder_categories(sorted(frame[column].cat.categories))
    return frame


# The arrow type each pandas dtype of the tables is read as (dictionary: pandas' category).
_ARROW_TYPES: dict[str, pa.DataType] = {
    "category": pa.dictionary(pa.int32(), pa.string()), "str": pa.string(), "float64": pa.float64(),
    "int8": pa.int8(), "int16": pa.int16(), "int32": pa.int32(),
}


def _header(path: Path) -> list[str]:
    """The column names of a CSV file's first line."""
    try:
        with open(path, encoding="utf-8", newline="") as f:
            return next(csv.reader(f), [])
    except (OSError, UnicodeDecodeError) as exc:
        raise DatalogError(f"{path}: cannot read: {exc}") from None


def _torn(path: Path) -> bool:
    """True if the file does not end with a line break (a write was cut short)."""
    with open(path, "rb") as f:
        f.seek(0, 2)
        if f.tell() == 0:
            return False
        f.seek(-1, 2)
        return f.read(1) != b"\n"


def _concat_results(frames: list[pd.DataFrame]) -> pd.DataFrame:
    if len(frames) == 1:
        return frames[0]
    # Categories differ per file; union them so concat keeps the compact dtype.
    for column, dtype in RESULT_DTYPES.items():
        if dtype == "category":
            union = pd.api.types.union_categoricals([f[column] for f in frames]).categories
            for f in frames:
                f[column] = f[column].cat.set_categories(union)
    return pd.concat(frames, ignore_index=True)


def computed_rows(results: pd.DataFrame) -> pd.DataFrame:
    """Result rows that are computed figures (raw sweep points left out)."""
    return results[~results["PARAM"].isin(RAW_PARAMS)]


def text_codes(column: pd.Series) -> tuple[np.ndarray, np.ndarray]:
    """(integer code of each row, text of each code) of a text column; a missing value is the
    text "nan", as str() gives it."""
    if not isinstance(column.dtype, pd.CategoricalDtype) or column.isna().any():
        column = column.astype(str).astype("category")
    return column.cat.codes.to_numpy(), column.cat.categories.astype(str).to_numpy(dtype=object)

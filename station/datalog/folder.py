"""The datalog folder format in one place: file names, columns and what each cell may hold,
the one error type, SHA-256 of files, durable atomic writes, and the matching of results.csv
rows to their parts.csv row. Described for users in docs/datalog-format.md.

Everything that writes or reads a datalog folder (writer, resume, manifest, seal, STDF
export, the review loader) takes these from here, so the format is defined once.
"""

from __future__ import annotations

import csv
import hashlib
import io
import json
import math
import os
from collections.abc import Iterator, Sequence
from contextlib import contextmanager
from pathlib import Path
from typing import Any

import numpy as np
import pandas as pd

from station.datalog.header import header_problem
from station.errors import Refused

# The format's versions. Each later version only appends columns to the CSV files
# (ADDED_COLUMNS), so a folder of an earlier version is read by filling those cells empty.
FORMAT_V1 = "ampscreen-datalog/1"
FORMAT = "ampscreen-datalog/2"      # results.csv PAT_LO/PAT_HI, parts.csv RESCREEN
FORMATS = {FORMAT_V1: 1, FORMAT: 2}

LOT_JSON = "lot.json"
RESULTS_CSV = "results.csv"
PARTS_CSV = "parts.csv"
MARKER = "in_progress.json"
MANIFEST = "manifest.json"
STDF_FILE = "lot.stdf"
SIM_TRUTH = "sim_truth.csv"
CONFIG_COPIES = ("sequence", "limits", "bench")        # copied as <key>.yaml at lot start
OPTIONAL_COPIES = ("applications",)   # copied too when the sequence names one (budget step)
END_OF_LOT_FILES = (MANIFEST, STDF_FILE, SIM_TRUTH)
# Every name the station writes into a datalog folder: a folder holding any of these is not
# overwritten without --force.
DATALOG_FILES = (LOT_JSON, RESULTS_CSV, PARTS_CSV, MARKER, *END_OF_LOT_FILES,
                 *(f"{key}.yaml" for key in CONFIG_COPIES + OPTIONAL_COPIES))

HEAD_NUM = 1

# What a cell may hold. "text" is anything; "int"/"float" must parse ('inf' is over-range);
# "flag" is 0 or 1; a trailing "?" allows the empty cell.
RESULT_CELLS: dict[str, str] = {
    "LOT_ID": "text", "PART_ID": "id", "HEAD_NUM": "int", "SITE_NUM": "int", "TEST_NUM": "int",
    "TEST_TXT": "text", "PARAM": "text", "REGION": "text", "VCM": "float?", "COND": "float?",
    "RESULT": "float", "UNITS": "text", "LO_LIMIT": "float?", "HI_LIMIT": "float?",
    "PASS": "flag?", "GRADE": "text", "PAT_LO": "float?", "PAT_HI": "float?",
}
PART_CELLS: dict[str, str] = {
    "LOT_ID": "text", "PART_ID": "id", "HEAD_NUM": "int", "SITE_NUM": "int", "HARD_BIN": "int",
    "SOFT_BIN": "int", "GRADE": "text", "PASS": "flag?", "TEST_T": "float?", "RETEST": "flag",
    "FAIL_TEST": "int?", "FAULT": "text", "END_T": "float?", "RESCREEN": "flag?",
}
RESULT_COLUMNS = list(RESULT_CELLS)
PART_COLUMNS = list(PART_CELLS)
COLUMNS = {RESULTS_CSV: RESULT_COLUMNS, PARTS_CSV: PART_COLUMNS}
CELLS = {RESULTS_CSV: RESULT_CELLS, PARTS_CSV: PART_CELLS}
# Columns each version appended at the end of a file (version -> file -> columns).
ADDED_COLUMNS: dict[int, dict[str, list[str]]] = {
    2: {RESULTS_CSV: ["PAT_LO", "PAT_HI"], PARTS_CSV: ["RESCREEN"]},
}

# Characters a lot id may hold to become a folder name (datalogs/<lot id>): letters, digits,
# '.', '_' and '-', starting with a letter or digit (so never '..', never a path).
SAFE_NAME_CHARS = "letters, digits, '.', '_' and '-', starting with a letter or a digit"
_NAME_PUNCT = "._-"


class DatalogError(Refused):
    """A datalog folder cannot be used: not a datalog, damaged, or not to be overwritten.

    One line: ``file:line: column: what is wrong (how to fix)``, the parts that are known.
    A refused input (exit 2)."""

    def __init__(self, message: str, *, path: str | Path | None = None, line: int | None = None,
                 column: str | None = None, hint: str | None = None) -> None:
        self.path = None if path is None else str(path)
        self.line = line
        self.column = column
        self.message = message
        self.hint = hint
        where = [p for p in (self.path if line is None else f"{self.path}:{line}", column) if p]
        text = ": ".join([*where, message]) + (f" ({hint})" if hint else "")
        super().__init__(text)


# --- names ---------------------------------------------------------------------------------

def is_safe_folder_name(name: str) -> bool:
    """True if `name` can be a folder name as it is (see SAFE_NAME_CHARS)."""
    return (0 < len(name) <= 100 and name[0].isascii() and name[0].isalnum()
            and all((c.isascii() and c.isalnum()) or c in _NAME_PUNCT for c in name))


# --- hashes --------------------------------------------------------------------------------

def sha256_of(path: Path) -> str:
    """Hex SHA-256 of a file's bytes."""
    digest = hashlib.sha256()
    with open(path, "rb") as handle:
        for block in iter(lambda: handle.read(1 << 20), b""):
            digest.update(block)
    return digest.hexdigest()


def sha256_of_text(text: str) -> str:
    """Hex SHA-256 of a text as UTF-8."""
    return hashlib.sha256(text.encode("utf-8")).hexdigest()


# --- durable writes ------------------------------------------------------------------------

def fsync_dir(folder: Path) -> None:
    """Make a rename or an unlink in `folder` durable (POSIX; a no-op where not supported)."""
    try:
        fd = os.open(folder, os.O_RDONLY)
    except OSError:
        return
    try:
        os.fsync(fd)
    except OSError:
        pass
    finally:
        os.close(fd)


def fsync_file(path: Path) -> None:
    fd = os.open(path, os.O_RDONLY)
    try:
        os.fsync(fd)
    finally:
        os.close(fd)


@contextmanager
def atomic_target(path: Path) -> Iterator[Path]:
    """Yield a temporary path beside `path`; once the block has written it, fsync it, rename
    it over `path` and fsync the folder. A crash leaves the old file or the new one, never
    half of one; an error in the block leaves the old file and removes the temporary one."""
    path = Path(path)
    temp = path.with_name(path.name + ".partial")
    try:
        yield temp
        fsync_file(temp)
        os.replace(temp, path)
    except BaseException:
        temp.unlink(missing_ok=True)
        raise
    fsync_dir(path.parent)


def write_atomically(path: Path, data: str | bytes) -> None:
    """Write `data` (text as UTF-8) to `path` through atomic_target."""
    raw = data.encode("utf-8") if isinstance(data, str) else data
    with atomic_target(path) as temp:
        temp.write_bytes(raw)


def append_durably(fd: int, data: bytes) -> None:
    """Append all of `data` to an open file descriptor and fsync it. A failure (a full disk)
    raises OSError; no Python buffer keeps the rest to be written later."""
    view = memoryview(data)
    while view:
        written = os.write(fd, view)
        view = view[written:]
    os.fsync(fd)


def csv_text(rows: Sequence[Sequence[Any]], columns: Sequence[str] | None = None) -> str:
    """CSV text of `rows` (with a header line first when `columns` is given)."""
    buffer = io.StringIO(newline="")
    writer = csv.writer(buffer)
    if columns is not None:
        writer.writerow(columns)
    writer.writerows(rows)
    return buffer.getvalue()


# --- versions ------------------------------------------------------------------------------

def format_version(header: dict[str, Any]) -> int:
    """The format version of a lot.json read by read_lot_header (1 or 2)."""
    return FORMATS[str(header.get("format"))]


def columns_of(name: str, version: int) -> list[str]:
    """The columns of results.csv or parts.csv (by file name) in a format version."""
    later = [c for v, added in ADDED_COLUMNS.items() if v > version for c in added.get(name, [])]
    return [c for c in COLUMNS[name] if c not in later]


def version_of_columns(name: str, first: list[str]) -> int | None:
    """The format version whose columns a header line is, or None."""
    return next((v for v in sorted(FORMATS.values(), reverse=True) if first == columns_of(name, v)), None)


def upgrade_row(row: list[str], name: str) -> list[str]:
    """A row of an earlier version as a row of the current columns (added cells empty)."""
    return row + [""] * (len(COLUMNS[name]) - len(row))


# --- reading -------------------------------------------------------------------------------

def read_lot_header(folder: Path) -> dict[str, Any]:
    """lot.json of a datalog folder; DatalogError if the folder or the header is not one."""
    folder = Path(folder)
    path = folder / LOT_JSON
    if not folder.is_dir():
        raise DatalogError("no such folder", path=folder, hint="give a datalog folder written with --out")
    if not path.is_file():
        raise DatalogError(f"not a datalog folder (no {LOT_JSON})", path=folder,
                           hint="give a datalog folder written with --out")
    try:
        header = json.loads(path.read_text(encoding="utf-8"))
    except (OSError, UnicodeDecodeError, ValueError) as exc:
        raise DatalogError(f"cannot be read as JSON ({exc})", path=path) from None
    if not isinstance(header, dict) or header.get("format") not in FORMATS:
        found = header.get("format") if isinstance(header, dict) else None
        known = " or ".join(repr(f) for f in FORMATS)
        raise DatalogError(f"not a datalog header (format {found!r}, expected {known})", path=path,
                           hint="a newer station wrote it?" if str(found).startswith("ampscreen-datalog/")
                           else None)
    problem = header_problem(header)
    if problem is not None:
        key, what = problem
        raise DatalogError(what, path=path, column=key,
                           hint="lot.json was edited or damaged: restore it from a copy of the datalog")
    return header


def read_rows(path: Path, *, torn: str = "refuse", version: int | None = None) -> tuple[list[list[str]], int]:
    """The data rows of results.csv or parts.csv (by file name), each checked against the
    format and given in the current columns (a row of an earlier version has its added
    cells empty); and how many bytes of a torn last line (after the last newline) were dropped.

    `torn`: "refuse" a torn last line, or "drop" it (resume: the process died inside a write).
    `version`: the folder's format version (lot.json); its columns are required. None takes
    the columns of any version.
    """
    path = Path(path)
    cells = CELLS[path.name]
    try:
        text = path.read_text(encoding="utf-8", errors="replace")
    except FileNotFoundError:
        raise DatalogError("missing (not a datalog folder?)", path=path) from None
    except OSError as exc:
        raise DatalogError(f"cannot be read ({exc.strerror})", path=path) from None
    end = text.rfind("\n") + 1
    dropped = len(text) - end
    if dropped and torn != "drop":
        lines = text.count("\n") + 1
        raise DatalogError(f"torn last line ({dropped} bytes after the last line break)", path=path,
                           line=lines, hint="resume the lot with --resume, which drops it")
    reader = csv.reader(io.StringIO(text[:end], newline=""))
    first = next(reader, None)
    if first is None:
        raise DatalogError("empty: no column header line", path=path)
    found = version_of_columns(path.name, first)
    if found is None or (version is not None and found != version):
        columns = columns_of(path.name, version or max(FORMATS.values()))
        missing = [c for c in columns if c not in first]
        what = (f"missing column(s) {', '.join(missing)}" if missing
                else f"the first line is not the {path.name} column header"
                + (f" of format {version} (lot.json)" if version is not None else ""))
        raise DatalogError(what, path=path, line=1, hint="see docs/datalog-format.md")
    columns = columns_of(path.name, found)
    body = []
    for row in reader:
        if row:                       # a blank line holds no row (as every CSV reader takes it)
            check_row(path, reader.line_num, row, columns, cells)
            body.append(upgrade_row(row, path.name))
    return body, dropped


def check_row(path: Path, line: int, row: list[str], columns: list[str], cells: dict[str, str]) -> None:
    """DatalogError naming file, line and column if a row does not fit the format."""
    if len(row) != len(columns):
        raise DatalogError(f"{len(row)} fields where {len(columns)} were expected (the row is damaged)",
                           path=path, line=line)
    for column, value in zip(columns, row, strict=True):
        problem = _cell_problem(cells[column], value)
        if problem:
            raise DatalogError(f"{value!r} {problem}", path=path, line=line, column=column)


def _cell_problem(kind: str, value: str) -> str:
    if kind.endswith("?"):
        if value == "":
            return ""
        kind = kind[:-1]
    if kind == "text":
        return ""
    if kind == "id":
        return "" if value.strip() else "is empty (a part id is required)"
    if kind == "flag":
        return "" if value in ("0", "1") else "is not 0 or 1"
    if kind == "int":
        try:
            int(value)
        except ValueError:
            return "is not a whole number"
        return ""
    try:
        number = float(value)
    except ValueError:
        return "is not a number"
    return "" if not math.isnan(number) else "is not a number (nan)"


# --- results to parts ----------------------------------------------------------------------

def match_results_to_parts(result_parts: Sequence[Any], result_sites: Sequence[Any],
                           result_tests: Sequence[Any], part_ids: Sequence[Any],
                           part_sites: Sequence[Any], part_has_results: Sequence[bool]) -> np.ndarray:
    """For each results.csv row, the index of the parts.csv row it belongs to (-1: none).

    results.csv has no part number of its own: a part's result rows are written together,
    before its part row (the commit record), in the same order as parts.csv. So the k-th
    block of rows of part P on site S is the k-th parts.csv row of (P, S) that has results
    (a tester fault has none). A block starts where the part or the site changes. Where
    parts.csv holds more tests of (P, S) than that finds (P retested on the same site right
    after itself), a test number seen again in a block starts the next block (a sequence
    gives each test number once per part). Arguments are columns (any array-likes); sites
    and test numbers compare as given, so pass them with one type on both sides.
    """
    n_results = len(result_parts)
    if n_results == 0:
        return np.zeros(0, dtype=np.int64)
    n_parts = len(part_ids)
    # Series, not object arrays: a column of arrow strings factorises many times faster.
    ids, _ = pd.factorize(pd.concat([pd.Series(part_ids), pd.Series(result_parts)], ignore_index=True))
    sites, site_names = pd.factorize(pd.concat([pd.Series(part_sites), pd.Series(result_sites)],
                                               ignore_index=True))
    keys = ids.astype(np.int64) * max(len(site_names), 1) + sites
    part_key, result_key = keys[:n_parts], keys[n_parts:]
    with_results = np.flatnonzero(np.asarray(part_has_results, dtype=bool))

    starts = np.ones(n_results, dtype=bool)
    starts[1:] = result_key[1:] != result_key[:-1]
    block = np.cumsum(starts) - 1
    space = int(keys.max()) + 1
    wanted = np.bincount(part_key[with_results], minlength=space)
    found = np.bincount(result_key[starts], minlength=space)
    split = (wanted > found)[result_key]
    if split.any():
        block = _split_repeated_tests(block, np.asarray(result_tests, dtype=object), split)
        starts = np.ones(n_results, dtype=bool)
        starts[1:] = block[1:] != block[:-1]
        block = np.cumsum(starts) - 1
    block_key = result_key[starts]
    block_occurrence = pd.Series(block_key).groupby(block_key).cumcount().to_numpy()
    part_occurrence = pd.Series(part_key[with_results]).groupby(part_key[with_results]).cumcount().to_numpy()
    width = int(max(block_occurrence.max(initial=0), part_occurrence.max(initial=0))) + 1
    position = pd.Index(part_key[with_results] * width + part_occurrence).get_indexer(
        block_key * width + block_occurrence)
    part_of_block = np.where(position >= 0, with_results[np.maximum(position, 0)] if len(with_results)
                             else -1, -1)
    return part_of_block.astype(np.int64)[block]


def _split_repeated_tests(block: np.ndarray, tests: np.ndarray, split: np.ndarray) -> np.ndarray:
    """Blocks of the `split` rows cut where a test number comes again (rare: a part retested
    on the same site right after itself), so Python loops over those rows only."""
    run = np.zeros(len(block), dtype=np.int64)
    current, number = -1, 0
    seen: set[Any] = set()
    for i in np.flatnonzero(split):
        if block[i] != current:
            current, number, seen = block[i], 0, set()
        elif tests[i] in seen:
            number, seen = number + 1, set()
        seen.add(tests[i])
        run[i] = number
    return np.asarray(block, dtype=np.int64) * (int(run.max()) + 1) + run

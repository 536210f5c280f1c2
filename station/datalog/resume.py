"""Continuing an interrupted lot in its own datalog folder (`--resume DIR`).

`inspect_resume` reads the folder without changing it and refuses, with one line, a folder
that is not a datalog, a finished lot, another mode or lot id, or sequence/limit files that
are not the ones the lot started with (SHA-256 in lot.json). It works out what survives:

- a torn last line of results.csv or parts.csv (the process died inside a write) is dropped;
- the rows written after the in_progress.json marker (the index that was under test) are
  dropped, and the marker's parts are retested (RETEST=1);
- result rows of a part with no parts.csv row are dropped (the part is retested).

`ResumeState.apply()` then rewrites the two CSV files with the whole parts only; the writer
appends after them. Format: docs/datalog-format.md.
"""

from __future__ import annotations

import csv
import io
import json
from dataclasses import dataclass, field
from pathlib import Path
from typing import Any

from station.datalog.writer import (
    FORMAT,
    MARKER,
    PART_COLUMNS,
    RESULT_COLUMNS,
    DatalogError,
    sha256_of,
    write_durably,
)

_P = {name: i for i, name in enumerate(PART_COLUMNS)}
_R = {name: i for i, name in enumerate(RESULT_COLUMNS)}


class ResumeRefused(DatalogError):
    """The folder cannot be resumed with these files (one line: what and how to fix)."""


@dataclass
class ResumeState:
    folder: Path
    header: dict[str, Any]
    part_rows: list[list[str]]
    result_rows: list[list[str]]
    interrupted: list[str] = field(default_factory=list)   # ids under test when it stopped
    presented_before: int = 0      # parts the handler had presented before that index
    warnings: list[str] = field(default_factory=list)

    @property
    def seen_ids(self) -> set[str]:
        """Every id with a row, plus the interrupted ones: a later test of these is a retest."""
        return {row[_P["PART_ID"]] for row in self.part_rows} | set(self.interrupted)

    @property
    def done_ids(self) -> set[str]:
        """Parts finished in an earlier session (they are not tested again)."""
        return {row[_P["PART_ID"]] for row in self.part_rows} - set(self.interrupted)

    def apply(self) -> None:
        """Rewrite results.csv and parts.csv with the surviving rows (atomically, fsync'ed)."""
        write_durably(self.folder / "results.csv", _csv_text(RESULT_COLUMNS, self.result_rows))
        write_durably(self.folder / "parts.csv", _csv_text(PART_COLUMNS, self.part_rows))


def inspect_resume(folder: Path, *, mode: str, sequence: Path, limits: Path,
                   lot_id: str | None = None) -> ResumeState:
    """Everything a resumed lot needs from `folder`; ResumeRefused if it cannot be resumed."""
    folder = Path(folder)
    header = _read_header(folder)
    if header.get("complete"):
        raise ResumeRefused(f"{folder}: the lot ran to its end (lot.json complete: true); "
                            "nothing to resume: start a new lot in another --out")
    if header.get("mode") != mode:
        raise ResumeRefused(f"{folder}: this lot was a {header.get('mode')!r} lot; resume it with "
                            f"`station {header.get('mode')} --resume`")
    if lot_id is not None and lot_id != header.get("lot_id"):
        raise ResumeRefused(f"{folder}: holds lot {header.get('lot_id')!r}, not {lot_id!r} "
                            "(give the lot id it was started with, or another folder)")
    for key, given in (("sequence", sequence), ("limits", limits)):
        _check_same_file(folder, header, key, Path(given))
    warnings: list[str] = []
    parts = _read_rows(folder / "parts.csv", PART_COLUMNS, warnings)
    results = _read_rows(folder / "results.csv", RESULT_COLUMNS, warnings)
    interrupted: list[str] = []
    presented_before = len({row[_P["PART_ID"]] for row in parts})
    marker = _read_marker(folder, header)
    if marker is not None:
        interrupted = [str(i) for i in marker["ids"]]
        keep_parts, keep_results = int(marker["parts_rows"]), int(marker["results_rows"])
        if keep_parts > len(parts) or keep_results > len(results):
            raise ResumeRefused(f"{folder}/{MARKER}: says {keep_parts} part rows and {keep_results} "
                                f"result rows were on disk, but the files hold fewer: the datalog "
                                "was changed by hand; it cannot be resumed")
        dropped = len(parts) - keep_parts
        if dropped or len(results) > keep_results:
            warnings.append(f"dropped {dropped} part row(s) and {len(results) - keep_results} result "
                            f"row(s) of the index under test when the lot stopped ({', '.join(interrupted)})")
        parts, results = parts[:keep_parts], results[:keep_results]
        presented_before = int(marker["presented_before"])
    results, orphans = _whole_parts_only(parts, results, warnings)
    interrupted += [pid for pid in orphans if pid not in interrupted]
    return ResumeState(folder, header, parts, results, interrupted, presented_before, warnings)


def _read_header(folder: Path) -> dict[str, Any]:
    path = folder / "lot.json"
    if not folder.is_dir():
        raise ResumeRefused(f"--resume {folder}: no such folder (give the datalog folder of the lot)")
    if not path.exists():
        raise ResumeRefused(f"--resume {folder}: not a datalog folder (no lot.json)")
    try:
        header = json.loads(path.read_text(encoding="utf-8"))
    except (OSError, ValueError) as exc:
        raise ResumeRefused(f"{path}: cannot be read as JSON ({exc}); it cannot be resumed") from None
    if not isinstance(header, dict) or header.get("format") != FORMAT:
        raise ResumeRefused(f"{path}: not a {FORMAT} lot header; it cannot be resumed")
    for name in ("parts.csv", "results.csv"):
        if not (folder / name).exists():
            raise ResumeRefused(f"--resume {folder}: not a datalog folder (no {name})")
    return header


def _check_same_file(folder: Path, header: dict[str, Any], key: str, given: Path) -> None:
    recorded = header.get(key) or {}
    try:
        digest = sha256_of(given)
    except OSError as exc:
        raise ResumeRefused(f"--{key} {given}: cannot be read ({exc.strerror})") from None
    if digest != recorded.get("sha256"):
        raise ResumeRefused(f"--{key} {given}: is not the {key} file this lot started with "
                            f"(SHA-256 differs from {folder}/lot.json; its copy is {folder}/{key}.yaml)")


def _read_rows(path: Path, columns: list[str], warnings: list[str]) -> list[list[str]]:
    try:
        text = path.read_text(encoding="utf-8", errors="replace")
    except OSError as exc:
        raise ResumeRefused(f"{path}: cannot be read ({exc.strerror})") from None
    end = text.rfind("\n") + 1
    if end < len(text):  # every row ends in a newline; bytes after the last one are half a row
        warnings.append(f"{path.name}: dropped a torn last line ({len(text) - end} bytes)")
        text = text[:end]
    rows = list(csv.reader(io.StringIO(text, newline="")))
    if not rows:
        return []
    if rows[0] != columns:
        raise ResumeRefused(f"{path}: the first line is not the {path.name} column header; "
                            "it cannot be resumed")
    body = rows[1:]
    for number, row in enumerate(body, start=2):
        if len(row) != len(columns):
            raise ResumeRefused(f"{path}:{number}: {len(row)} fields where {len(columns)} were "
                                "expected; the file is damaged and cannot be resumed")
    return body


def _read_marker(folder: Path, header: dict[str, Any]) -> dict[str, Any] | None:
    path = folder / MARKER
    if not path.exists():
        return None
    try:
        marker = json.loads(path.read_text(encoding="utf-8"))
        ids = marker["ids"]
        int(marker["parts_rows"]), int(marker["results_rows"]), int(marker["presented_before"])
    except (OSError, ValueError, KeyError, TypeError) as exc:
        raise ResumeRefused(f"{path}: cannot be read ({exc}); it cannot be resumed") from None
    if not isinstance(ids, list) or marker.get("lot_id") != header.get("lot_id"):
        raise ResumeRefused(f"{path}: does not belong to lot {header.get('lot_id')!r}")
    return marker


def _whole_parts_only(parts: list[list[str]], results: list[list[str]],
                      warnings: list[str]) -> tuple[list[list[str]], list[str]]:
    """Results are written before their part row: match them up in file order and keep
    only results that a part row follows. A tester fault's part row has no results."""
    kept = 0
    for part in parts:
        if part[_P["FAULT"]]:
            continue
        key = (part[_P["PART_ID"]], part[_P["SITE_NUM"]])
        while kept < len(results) and (results[kept][_R["PART_ID"]], results[kept][_R["SITE_NUM"]]) == key:
            kept += 1
    orphans = sorted({row[_R["PART_ID"]] for row in results[kept:]})
    if orphans:
        warnings.append(f"results.csv: dropped {len(results) - kept} result row(s) with no parts.csv row "
                        f"(part(s) {', '.join(orphans)}: retested)")
    return results[:kept], orphans


def _csv_text(columns: list[str], rows: list[list[str]]) -> str:
    buffer = io.StringIO(newline="")
    writer = csv.writer(buffer)
    writer.writerow(columns)
    writer.writerows(rows)
    return buffer.getvalue()

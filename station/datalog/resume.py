"""Continuing an interrupted lot in its own datalog folder (`--resume DIR`).

`inspect_resume` reads the folder without changing it and refuses, with one line, a folder
that is not a datalog, a sealed finished lot, another mode or lot id, sequence/limit files
that are not the ones the lot started with (SHA-256 in lot.json), or a row that does not fit
the format (file:line: column: what). It works out what survives:

- a torn last line of results.csv or parts.csv (the process died inside a write) is dropped;
- the rows written after the in_progress.json marker (the index that was under test) are
  dropped, and the marker's parts are retested (RETEST=1);
- result rows after the last part row's results (a part row is the commit record of its
  results) are the part that was in progress: dropped, and the part retested.

A lot that reached its end (lot.json complete) but has no manifest.json was killed during
the end-of-lot commit: the state says `ended`, and the caller seals it
(station/datalog/seal.py) instead of testing anything.

`ResumeState.apply()` then rewrites the two CSV files with the whole parts only, in the
current format's columns (a folder of format 1 is upgraded, and its lot.json says so), with
the RESCREEN marks of an earlier lot end cleared (the lot's end sets them again); the writer
appends after them. Format: station/datalog/folder.py and docs/datalog-format.md.
"""

from __future__ import annotations

import json
from dataclasses import dataclass, field
from pathlib import Path
from typing import Any

import numpy as np

from station.datalog.folder import (
    FORMAT,
    MANIFEST,
    MARKER,
    PART_COLUMNS,
    PARTS_CSV,
    RESULT_COLUMNS,
    RESULTS_CSV,
    DatalogError,
    csv_text,
    format_version,
    match_results_to_parts,
    read_lot_header,
    read_rows,
    sha256_of,
    write_atomically,
)

_P = {name: i for i, name in enumerate(PART_COLUMNS)}
_R = {name: i for i, name in enumerate(RESULT_COLUMNS)}

# The one error type of the datalog folder; this name is kept for the callers that use it.
ResumeRefused = DatalogError


def part_fields(row: list[str]) -> tuple[str, int, int, str, str, str]:
    """(PART_ID, HARD_BIN, SOFT_BIN, GRADE, PASS, RETEST) of a parts.csv row, by column name
    (the cells of PASS and RETEST as text: '' / '0' / '1')."""
    return (row[_P["PART_ID"]], int(row[_P["HARD_BIN"]]), int(row[_P["SOFT_BIN"]]), row[_P["GRADE"]],
            row[_P["PASS"]], row[_P["RETEST"]])


@dataclass
class ResumeState:
    folder: Path
    header: dict[str, Any]
    part_rows: list[list[str]]
    result_rows: list[list[str]]
    interrupted: list[str] = field(default_factory=list)   # ids under test when it stopped
    presented_before: int = 0      # parts the handler had presented before that index
    warnings: list[str] = field(default_factory=list)
    ended: bool = False            # the lot reached its end; only its seal is missing

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
        for row in self.part_rows:
            row[_P["RESCREEN"]] = ""
        write_atomically(self.folder / RESULTS_CSV, csv_text(self.result_rows, RESULT_COLUMNS))
        write_atomically(self.folder / PARTS_CSV, csv_text(self.part_rows, PART_COLUMNS))


def inspect_resume(folder: Path, *, mode: str, sequence: Path, limits: Path,
                   lot_id: str | None = None) -> ResumeState:
    """Everything a resumed lot needs from `folder`; DatalogError if it cannot be resumed."""
    folder = Path(folder)
    header = _read_header(folder)
    ended = bool(header.get("complete"))
    if ended and (folder / MANIFEST).exists():
        raise DatalogError("the lot ran to its end (lot.json complete: true, sealed by manifest.json); "
                           "nothing to resume", path=folder, hint="start a new lot in another --out")
    if header.get("mode") != mode:
        raise DatalogError(f"this lot was a {header.get('mode')!r} lot", path=folder,
                           hint=f"resume it with `station {header.get('mode')} --resume`")
    if lot_id is not None and lot_id != header.get("lot_id"):
        raise DatalogError(f"holds lot {header.get('lot_id')!r}, not {lot_id!r}", path=folder,
                           hint="give the lot id it was started with, or another folder")
    for key, given in (("sequence", sequence), ("limits", limits)):
        _check_same_file(folder, header, key, Path(given))
    warnings: list[str] = []
    torn = "refuse" if ended else "drop"   # an ended lot closed its files whole
    version = format_version(header)
    parts = _read(folder / PARTS_CSV, torn, warnings, version)
    results = _read(folder / RESULTS_CSV, torn, warnings, version)
    if version < format_version({"format": FORMAT}) and not ended:
        warnings.append(f"the datalog is of format {header.get('format')}: its CSV files are rewritten "
                        f"in {FORMAT} (the later columns empty for the parts logged so far)")
    interrupted: list[str] = []
    presented_before = len({row[_P["PART_ID"]] for row in parts})
    marker = None if ended else _read_marker(folder, header)
    if marker is not None:
        interrupted = [str(i) for i in marker["ids"]]
        keep_parts, keep_results = int(marker["parts_rows"]), int(marker["results_rows"])
        if keep_parts > len(parts) or keep_results > len(results):
            raise DatalogError(f"says {keep_parts} part rows and {keep_results} result rows were on disk, "
                               "but the files hold fewer: the datalog was changed by hand; it cannot be "
                               "resumed", path=folder / MARKER)
        dropped = len(parts) - keep_parts
        if dropped or len(results) > keep_results:
            warnings.append(f"dropped {dropped} part row(s) and {len(results) - keep_results} result "
                            f"row(s) of the index under test when the lot stopped ({', '.join(interrupted)})")
        parts, results = parts[:keep_parts], results[:keep_results]
        presented_before = int(marker["presented_before"])
    results, orphans = _whole_parts_only(folder, parts, results, warnings)
    if ended and orphans:
        raise DatalogError(f"result rows of part(s) {', '.join(orphans)} have no parts.csv row, in a lot "
                           "that ended: the datalog is damaged", path=folder / RESULTS_CSV)
    interrupted += [pid for pid in orphans if pid not in interrupted]
    return ResumeState(folder, header, parts, results, interrupted, presented_before, warnings, ended)


def _read_header(folder: Path) -> dict[str, Any]:
    header = read_lot_header(folder)
    for name in (PARTS_CSV, RESULTS_CSV):
        if not (folder / name).exists():
            raise DatalogError(f"not a datalog folder (no {name})", path=folder)
    return header


def _read(path: Path, torn: str, warnings: list[str], version: int) -> list[list[str]]:
    rows, dropped = read_rows(path, torn=torn, version=version)
    if dropped:  # every row ends in a newline; bytes after the last one are half a row
        warnings.append(f"{path.name}: dropped a torn last line ({dropped} bytes)")
    return rows


def _check_same_file(folder: Path, header: dict[str, Any], key: str, given: Path) -> None:
    recorded = header.get(key) or {}
    try:
        digest = sha256_of(given)
    except OSError as exc:
        raise DatalogError(f"cannot be read ({exc.strerror})", path=f"--{key} {given}") from None
    if digest != recorded.get("sha256"):
        raise DatalogError(f"is not the {key} file this lot started with (SHA-256 differs from "
                           f"{folder}/lot.json; its copy is {folder}/{key}.yaml)", path=f"--{key} {given}")


def _read_marker(folder: Path, header: dict[str, Any]) -> dict[str, Any] | None:
    path = folder / MARKER
    if not path.exists():
        return None
    try:
        marker = json.loads(path.read_text(encoding="utf-8"))
        ids = marker["ids"]
        int(marker["parts_rows"]), int(marker["results_rows"]), int(marker["presented_before"])
    except (OSError, ValueError, KeyError, TypeError) as exc:
        raise DatalogError(f"cannot be read ({exc}); it cannot be resumed", path=path) from None
    if not isinstance(ids, list) or marker.get("lot_id") != header.get("lot_id"):
        raise DatalogError(f"does not belong to lot {header.get('lot_id')!r}", path=path)
    return marker


def _whole_parts_only(folder: Path, parts: list[list[str]], results: list[list[str]],
                      warnings: list[str]) -> tuple[list[list[str]], list[str]]:
    """Keep the results that a part row commits. Results after the last committed ones are
    the part in progress (dropped, retested); results of no part before that are damage."""
    owner = match_results_to_parts(
        [r[_R["PART_ID"]] for r in results], [r[_R["SITE_NUM"]] for r in results],
        [r[_R["TEST_NUM"]] for r in results], [p[_P["PART_ID"]] for p in parts],
        [p[_P["SITE_NUM"]] for p in parts], [p[_P["PASS"]] != "" for p in parts])
    matched = np.flatnonzero(owner >= 0)
    kept = int(matched[-1]) + 1 if len(matched) else 0
    stray = np.flatnonzero(owner[:kept] < 0)
    if len(stray):
        row = results[int(stray[0])]
        raise DatalogError(f"PART_ID: part {row[_R['PART_ID']]!r} site {row[_R['SITE_NUM']]} has result rows "
                           "but no parts.csv row, before parts that do: the datalog is damaged and cannot be "
                           "resumed", path=folder / RESULTS_CSV, line=int(stray[0]) + 2)
    orphans = sorted({row[_R["PART_ID"]] for row in results[kept:]})
    if orphans:
        warnings.append(f"results.csv: dropped {len(results) - kept} result row(s) with no parts.csv row "
                        f"(part(s) {', '.join(orphans)}: retested)")
    return results[:kept], orphans

"""The end of a lot as an ordered, restartable commit of its datalog folder.

In order, each file written whole (temporary file, fsync, rename, fsync of the folder):

1. lot.json with the end-of-lot figures (the writer's `finish`, by the lot runner);
2. parts.csv with its RESCREEN cells set from lot.json `pat` (dynamic PAT: the baseline parts
   re-checked at the lot end, 1 on the re-screen list, 0 inside the limits); rewritten only
   if a cell changes;
3. sim_truth.csv, on a dry run (the simulator's true parameters);
4. lot.stdf, when asked for (it is made from lot.json and the CSV files);
5. manifest.json, last: the seal. A folder with a manifest is finished.

A kill between any two steps leaves a folder whose lot.json says how the lot ended and that
has no manifest. `seal_datalog` does steps 2-5 again from what is on disk, so `--resume` (or
`station verify --seal`) finishes such a folder; each step gives the same file when done twice.
Before sealing, the CSV files are checked against the format and the copies of the applied
files against lot.json, so damage is never sealed.
"""

from __future__ import annotations

from collections.abc import Callable
from pathlib import Path
from typing import Any

from station.datalog.folder import (
    LOT_JSON,
    MANIFEST,
    PART_COLUMNS,
    PARTS_CSV,
    RESULTS_CSV,
    SIM_TRUTH,
    STDF_FILE,
    DatalogError,
    atomic_target,
    csv_text,
    format_version,
    read_lot_header,
    read_rows,
    write_atomically,
)

_RESCREEN = PART_COLUMNS.index("RESCREEN")
_PART_ID = PART_COLUMNS.index("PART_ID")


def is_ended_unsealed(folder: Path) -> bool:
    """True if the lot reached its end (lot.json complete) but the folder has no seal yet."""
    try:
        header = read_lot_header(folder)
    except DatalogError:
        return False
    return bool(header.get("complete")) and not (Path(folder) / MANIFEST).exists()


def seal_datalog(folder: Path, *, stdf: bool = False,
                 write_truth: Callable[[Path], None] | None = None) -> list[str]:
    """Write the end-of-lot files after lot.json (steps 2-5 above); the names written.

    `write_truth(path)` writes the simulator's truth (a dry run); without it an existing
    sim_truth.csv is kept. `stdf`: write lot.stdf (also rewritten if it exists already)."""
    from station.datalog.manifest import check_config_copies, write_manifest
    from station.datalog.stdf_export import write_stdf

    folder = Path(folder)
    header = read_lot_header(folder)
    version = format_version(header)
    for name in (RESULTS_CSV, PARTS_CSV):    # refuses a torn or damaged row, naming its line
        read_rows(folder / name, version=version)
    problems = check_config_copies(folder)
    if problems:
        raise DatalogError(f"not sealed: {problems[0]}", path=folder / LOT_JSON)
    written: list[str] = []
    if version >= 2 and mark_rescreen(folder, header):
        written.append(PARTS_CSV)
    if write_truth is not None:
        with atomic_target(folder / SIM_TRUTH) as temp:
            write_truth(temp)
        written.append(SIM_TRUTH)
    if stdf or (folder / STDF_FILE).exists():
        write_stdf(folder)
        written.append(STDF_FILE)
    write_manifest(folder)
    written.append(MANIFEST)
    return written


def rescreen_marks(header: dict[str, Any]) -> dict[str, str]:
    """PART_ID -> RESCREEN cell from lot.json `pat`: '1' a baseline part on the re-screen list,
    '0' a baseline part inside the dynamic limits; empty (absent) when the lot had no in-lot
    baseline with limits (no dynamic PAT, limits from an earlier lot, a baseline never full)."""
    pat = header.get("pat")
    if not isinstance(pat, dict):
        return {}
    dyn = pat.get("dynamic")
    if not isinstance(dyn, dict) or not dyn.get("limits") or "rescreen" not in pat:
        return {}
    listed = {str(item.get("part")) for item in pat.get("rescreen") or [] if isinstance(item, dict)}
    return {str(pid): "1" if str(pid) in listed else "0" for pid in dyn.get("baseline_parts") or []}


def mark_rescreen(folder: Path, header: dict[str, Any]) -> bool:
    """Set parts.csv's RESCREEN cells (on the last row of each baseline part, the one its bin
    came from) by an atomic rewrite; True if the file changed."""
    path = Path(folder) / PARTS_CSV
    rows, _ = read_rows(path, version=format_version(header))
    marks = rescreen_marks(header)
    last = {row[_PART_ID]: n for n, row in enumerate(rows)}
    wanted = {last[pid]: cell for pid, cell in marks.items() if pid in last}
    changed = False
    for n, row in enumerate(rows):
        cell = wanted.get(n, "")
        if row[_RESCREEN] != cell:
            row[_RESCREEN], changed = cell, True
    if changed:
        write_atomically(path, csv_text(rows, PART_COLUMNS))
    return changed

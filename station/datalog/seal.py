"""The end of a lot as an ordered, restartable commit of its datalog folder.

In order, each file written whole (temporary file, fsync, rename, fsync of the folder):

1. lot.json with the end-of-lot figures (the writer's `finish`, by the lot runner);
2. sim_truth.csv, on a dry run (the simulator's true parameters);
3. lot.stdf, when asked for (it is made from lot.json and the CSV files);
4. manifest.json, last: the seal. A folder with a manifest is finished.

A kill between any two steps leaves a folder whose lot.json says how the lot ended and that
has no manifest. `seal_datalog` does steps 2-4 again from what is on disk, so `--resume` (or
`station verify --seal`) finishes such a folder; each step gives the same file when done twice.
Before sealing, the CSV files are checked against the format and the copies of the applied
files against lot.json, so damage is never sealed.
"""

from __future__ import annotations

from collections.abc import Callable
from pathlib import Path

from station.datalog.folder import (
    LOT_JSON,
    MANIFEST,
    PARTS_CSV,
    RESULTS_CSV,
    SIM_TRUTH,
    STDF_FILE,
    DatalogError,
    atomic_target,
    read_lot_header,
    read_rows,
)


def is_ended_unsealed(folder: Path) -> bool:
    """True if the lot reached its end (lot.json complete) but the folder has no seal yet."""
    try:
        header = read_lot_header(folder)
    except DatalogError:
        return False
    return bool(header.get("complete")) and not (Path(folder) / MANIFEST).exists()


def seal_datalog(folder: Path, *, stdf: bool = False,
                 write_truth: Callable[[Path], None] | None = None) -> list[str]:
    """Write the end-of-lot files after lot.json (steps 2-4 above); the names written.

    `write_truth(path)` writes the simulator's truth (a dry run); without it an existing
    sim_truth.csv is kept. `stdf`: write lot.stdf (also rewritten if it exists already)."""
    from station.datalog.manifest import check_config_copies, write_manifest
    from station.datalog.stdf_export import write_stdf

    folder = Path(folder)
    read_lot_header(folder)
    for name in (RESULTS_CSV, PARTS_CSV):
        read_rows(folder / name)              # refuses a torn or damaged row, naming its line
    problems = check_config_copies(folder)
    if problems:
        raise DatalogError(f"not sealed: {problems[0]}", path=folder / LOT_JSON)
    written: list[str] = []
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

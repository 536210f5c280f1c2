"""Review commands of `station`: summary, rebin, and the limits group (check, show, diff, propose).

Registered on the main `station` group by station/cli/main.py. Every error is one line, never a
traceback, with exit code 2 (bad input: a folder that is not a datalog, a bad limit table,
a file that cannot be written), as for the screening commands.
"""

from __future__ import annotations

import math
from pathlib import Path

import click
from rich.console import Console
from rich.progress import BarColumn, MofNCompleteColumn, Progress, TextColumn
from rich.table import Table

from station.config.files import ConfigError
from station.review.load import DatalogError, Datalogs, load_datalogs
from station.review.units import fmt, fmt_share

HEAD = "bold dark_cyan"


class BadInput(click.ClickException):
    """One clear line and exit code 2, like every refused input of `station`."""

    exit_code = 2


def _console() -> Console:
    return Console(width=None if Console().is_terminal else 160)


def _read(folders: tuple[Path, ...], console: Console) -> Datalogs:
    """Read the folders, with a progress bar when there are several."""
    try:
        if len(folders) < 2:
            return load_datalogs(list(folders))
        with Progress(TextColumn("reading datalogs"), BarColumn(), MofNCompleteColumn(), console=console,
                      transient=True) as progress:
            task = progress.add_task("read", total=len(folders))
            return load_datalogs(list(folders), progress=lambda _: progress.advance(task))
    except DatalogError as exc:
        raise BadInput(str(exc)) from None


def _table(path: Path):
    from station.config.limit_tables import load_limit_table

    try:
        return load_limit_table(path)
    except ConfigError as exc:
        raise BadInput(exc.one_line()) from None


def _refuse_unwritable(option: str, target: Path | None) -> None:
    if target is None:
        return
    folder = target.parent
    if not folder.is_dir():
        raise BadInput(f"{option} {target}: the folder {folder} does not exist (create it, or write elsewhere)")
    if target.is_dir():
        raise BadInput(f"{option} {target}: is a folder (give a file name)")


# ---- summary ----------------------------------------------------------------------------------

@click.command("summary")
@click.argument("datalogs", nargs=-1, required=False, type=click.Path(path_type=Path))
@click.option("--by", type=click.Choice(["site", "lot", "station", "hour", "shift"]), default=None,
              help="Add a yield table grouped this way (shift: by the floor's shift calendar).")
@click.option("--csv", "csv_file", type=click.Path(dir_okay=False, path_type=Path), default=None,
              help="Write every figure to one tidy CSV (a 'section' column says which table).")
@click.option("--html", "html_file", type=click.Path(dir_okay=False, path_type=Path), default=None,
              help="Write a self-contained HTML report with plots.")
@click.option("--store", "store_url", default=None,
              help="Summarise the fleet store (PostgreSQL URL) instead of folders, in SQL.")
@click.option("--parquet", "parquet_dir", type=click.Path(file_okay=False, path_type=Path), default=None,
              help="Summarise Parquet history (station export) in place with DuckDB.")
@click.option("--since", default=None, help="With --store/--parquet: parts ended in the last 8h, 30m, 2d...")
@click.option("--shift", "shift", default=None, metavar="NAME[@YYYY-MM-DD]",
              help="With --store/--parquet: parts ended in this shift (its latest start, or the one of that date).")
@click.option("--shifts", "shifts_file", type=click.Path(dir_okay=False, path_type=Path), default=None,
              help="The floor's shift calendar (YAML); default: the file $STATION_SHIFTS names.")
@click.option("--station", "station_name", default=None, help="With --store/--parquet: this station only.")
@click.option("--product", default=None, help="With --store/--parquet: this product only.")
def summary_command(datalogs: tuple[Path, ...], by: str | None, csv_file: Path | None,
                    html_file: Path | None, store_url: str | None, parquet_dir: Path | None,
                    since: str | None, shift: str | None, shifts_file: Path | None,
                    station_name: str | None, product: str | None) -> None:
    """End-of-shift summary of datalog folders, the fleet store or Parquet history: yield, bins, sites, Cpk."""
    from station.review.console import print_summary
    from station.review.export import write_csv
    from station.review.summary import summarise

    for option, target in (("--csv", csv_file), ("--html", html_file)):
        _refuse_unwritable(option, target)   # before the work, not after printing it all
    if shifts_file is not None and not shift and by != "shift":
        raise BadInput("--shifts names the calendar for --shift or --by shift: give one of them too")
    if store_url is not None or parquet_dir is not None:
        from station.cli.store_commands import database_summary

        calendar = _calendar(shifts_file) if shift or by == "shift" else None
        window = _window(since, shift, calendar)
        database_summary(datalogs, store_url, parquet_dir, window, station_name, product, by, csv_file, html_file,
                         calendar)
        return
    if not datalogs:
        raise BadInput("give one or more datalog folders, or --store URL, or --parquet DIR")
    if since or shift or station_name or product:
        raise BadInput("--since, --shift, --station and --product select from --store or --parquet (give one)")
    console = _console()
    calendar = _calendar(shifts_file) if by == "shift" else None
    logs = _read(datalogs, console)
    summary = summarise(logs, by=by, shifts=calendar)
    print_summary(summary, console)
    try:
        if csv_file is not None:
            write_csv(summary, csv_file)
            console.print(f"figures written to {csv_file}")
        if html_file is not None:
            from station.review.report import write_report

            write_report(logs, summary, html_file)
            console.print(f"report written to {html_file}")
    except OSError as exc:
        raise BadInput(f"cannot write: {exc}") from None


def _calendar(shifts_file: Path | None):
    """The floor's shift calendar (--shifts FILE or $STATION_SHIFTS); a bad one is refused at its line."""
    import os

    from station.config.shifts import calendar_path, load_shift_calendar

    return load_shift_calendar(calendar_path(shifts_file, dict(os.environ)))


def _window(since: str | None, shift: str | None, calendar):
    """The --since or --shift window as a Selection without station and product."""
    import time

    from station.store.summary_sql import Selection, parse_since

    if since and shift:
        raise BadInput("give --since or --shift, not both")
    if since:
        try:
            return Selection(since_t=parse_since(since))
        except ValueError as exc:
            raise BadInput(f"--since {exc}") from None
    if not shift:
        return Selection()
    try:
        found = calendar.window(shift, now=time.time())
    except ValueError as exc:
        raise BadInput(f"--shift {exc}") from None
    return Selection(since_t=found.start_t, until_t=found.end_t, window=found.describe)


# ---- rebin ------------------------------------------------------------------------------------

@click.command("rebin")
@click.argument("datalog", type=click.Path(path_type=Path))
@click.option("--limits", "limits_file", required=True, type=click.Path(path_type=Path),
              help="The limit table to re-grade with.")
@click.option("--out", "out_dir", type=click.Path(file_okay=False, path_type=Path), default=None,
              help="Write the re-binned parts.csv (same columns) into this folder.")
@click.option("--any-product", is_flag=True,
              help="Re-bin with a table written for another product name (e.g. one proposed from this lot).")
def rebin_command(datalog: Path, limits_file: Path, out_dir: Path | None, any_product: bool) -> None:
    """Re-grade and re-bin a datalog offline with another limit table; show what moves."""
    from station.review.rebin import (
        RebinError,
        bin_comparison,
        grade_yield,
        move_matrix,
        rebin,
        refuse_other_product,
        write_parts_csv,
    )

    console = _console()
    new = _table(limits_file)
    logs = _read((datalog,), console)
    try:
        if not any_product:
            refuse_other_product(logs, new)
        result = rebin(logs, new)
    except RebinError as exc:
        raise BadInput(str(exc)) from None
    grades = list(dict.fromkeys([*logs.parts.loc[logs.parts["PASS"] == 1, "GRADE"].unique(),
                                 *(g.name for g in new.grades)]))
    before, after = grade_yield(result.before, grades), grade_yield(result.after, grades)
    t = Table(title="Yield per grade (tester faults left out)", header_style=HEAD, title_justify="left")
    for column in ("grade", "before", "after"):
        t.add_column(column, justify="left" if column == "grade" else "right")
    for g in [*grades, "all"]:
        t.add_row(g, fmt_share(before[g]), fmt_share(after[g]))
    console.print(t)
    names = {**logs.bin_names("hard_bins"), **{n: b.name for n, b in new.hard_bins.items()}}
    soft_names = {**logs.bin_names("soft_bins"), **{n: b.name for n, b in new.soft_bins.items()}}
    for column, title, label in (("HARD_BIN", "Hard bins", names), ("SOFT_BIN", "Soft bins", soft_names)):
        frame = bin_comparison(result, column)
        t = Table(title=title, header_style=HEAD, title_justify="left")
        for c in ("bin", "name", "before", "after", "change"):
            t.add_column(c, justify="left" if c in ("bin", "name") else "right")
        for row in frame.itertuples():
            t.add_row(str(row.bin), label.get(int(row.bin), ""), str(row.before), str(row.after), f"{row.change:+d}")
        console.print(t)
    for column, title in (("HARD_BIN", "Moves between hard bins (rows: from, columns: to)"),
                          ("SOFT_BIN", "Moves between soft bins (rows: from, columns: to)")):
        matrix = move_matrix(result, column)
        t = Table(title=title, header_style=HEAD, title_justify="left")
        t.add_column("from \\ to")
        for c in matrix.columns:
            t.add_column(str(c), justify="right")
        for index, row in matrix.iterrows():
            t.add_row(str(index), *[("" if v == 0 else str(v)) if i != index else f"[dim]{v}[/]"
                                    for i, v in row.items()])
        console.print(t)
    console.print(f"{result.moved()} of {len(result.after)} parts change bin.")
    _escapes(console, datalog, result, new)
    for note in result.notes:
        console.print(f"note: {note}")
    if out_dir is not None:
        try:
            target = write_parts_csv(result, datalog, out_dir, new)
        except OSError as exc:
            raise BadInput(f"cannot write into {out_dir}: {exc}") from None
        console.print(f"re-binned parts written to {target}")


def _escapes(console: Console, datalog: Path, result, new) -> None:
    """On a dry run: escapes against the simulator's truth, as logged and re-binned."""
    import pandas as pd

    truth_file = datalog / "sim_truth.csv"
    if not truth_file.is_file():
        return
    from station.qualify.escapes import escapes, true_grade_breaks

    breaks = true_grade_breaks(pd.read_csv(truth_file, dtype={"PART_ID": str}), new)
    before, after = escapes(result.before, breaks), escapes(result.after, breaks)
    t = Table(title="Escapes against the simulator's truth", caption="parts in a grade whose true Vos, Iq, "
              "CMRR low/high or PSRR break its spec limits", header_style=HEAD, title_justify="left")
    for column in ("grade", "as logged", "re-binned"):
        t.add_column(column, justify="left" if column == "grade" else "right")
    for grade in breaks:
        t.add_row(grade, str(before.get(grade, 0)), str(after.get(grade, 0)))
    console.print(t)


# ---- limits -----------------------------------------------------------------------------------

@click.group("limits")
def limits_group() -> None:
    """Check, show, compare and propose limit tables."""


@limits_group.command("check")
@click.argument("file", type=click.Path(path_type=Path))
@click.option("--bench", "bench_file", type=click.Path(path_type=Path), default=None,
              help="Also check every limit against what this bench's fixture can resolve.")
@click.option("--sequence", "sequence_file", type=click.Path(path_type=Path), default=None,
              help="The sequence the limits are measured with (for --bench) [default: the demo product's].")
def limits_check(file: Path, bench_file: Path | None, sequence_file: Path | None) -> None:
    """Load a limit table: OK with a one-line summary, or the problem (exit 2)."""
    from station.review.limit_tools import check_summary

    table = _table(file)
    click.echo(check_summary(table))
    if bench_file is not None:
        from station.cli.qualify_commands import check_fixture_resolution

        check_fixture_resolution(table, bench_file, sequence_file)


@limits_group.command("show")
@click.argument("file", type=click.Path(path_type=Path))
@click.option("--grade", default=None, help="Show this grade only.")
@click.option("--history", is_flag=True, help="Show the table's change records instead (limits set, limits guard).")
def limits_show(file: Path, grade: str | None, history: bool) -> None:
    """A limit table in readable units, per grade and region."""
    from station.review.limit_tools import show_tables

    table = _table(file)
    if history:
        from station.review.limit_history import history_table

        _console().print(history_table(table.changes, f"{file}: changes"))
        return
    try:
        tables = show_tables(table, grade)
    except KeyError as exc:
        raise BadInput(str(exc.args[0])) from None
    console = _console()
    console.print(f"{table.product}: {table.note}")
    for t in tables:
        console.print(t)


@limits_group.command("diff")
@click.argument("old", type=click.Path(path_type=Path))
@click.argument("new", type=click.Path(path_type=Path))
def limits_diff(old: Path, new: Path) -> None:
    """What changed from OLD to NEW: limits added, removed, loosened, tightened; bins; regions."""
    from station.review.limit_tools import diff_table, diff_tables

    old_table, new_table = _table(old), _table(new)
    changes = diff_tables(old_table, new_table)
    console = _console()
    records = new_table.changes[len(old_table.changes):] if new_table.changes[:len(old_table.changes)] == \
        old_table.changes else new_table.changes
    if records:
        from station.review.limit_history import history_table

        console.print(history_table(records, f"change records in {new} not in {old}"))
    if not changes:
        console.print("no changes")
        return
    console.print(diff_table(changes))


@limits_group.command("propose")
@click.argument("datalog", type=click.Path(path_type=Path))
@click.option("--product", required=True, help="Product name of the proposed table.")
@click.option("--sigma", "sigma_k", type=float, default=4.0, show_default=True,
              help="Limits this many sigma from the mean.")
@click.option("--out", "out_file", type=click.Path(dir_okay=False, path_type=Path), default=None,
              help="Write the proposed table (YAML) here; else it is printed.")
def limits_propose(datalog: Path, product: str, sigma_k: float, out_file: Path | None) -> None:
    """Propose a one-grade limit table from characterisation data, with its predicted yield."""
    from station.review.propose import ProposeError, propose

    console = _console()
    logs = _read((datalog,), console)
    try:
        text, _table_obj, proposals, per_limit, overall = propose(logs, product, sigma_k)
    except ProposeError as exc:
        raise BadInput(str(exc)) from None
    t = Table(title=f"Proposed limits at {sigma_k:g} sigma (typical = mean + 1 sigma)", header_style=HEAD,
              title_justify="left")
    for column in ("parameter", "region", "n", "typical", "low", "high", "yield", "how"):
        t.add_column(column, justify="left" if column in ("parameter", "region", "how") else "right")
    yields = {(r.param, r.region): r._6 for r in per_limit.itertuples()}
    for p in proposals:
        t.add_row(p.param, p.region, str(p.count), fmt(p.typical, p.units, with_unit=True),
                  "" if p.low is None else fmt(p.low, p.units, with_unit=True),
                  "" if p.high is None else fmt(p.high, p.units, with_unit=True),
                  fmt_share(yields.get((p.param, p.region), math.nan)), p.method)
    console.print(t)
    console.print(f"Predicted yield with every limit: {fmt_share(overall)} "
                  "(of the parts with a pass/fail indication in the datalog)")
    if out_file is None:
        click.echo(text)
        return
    try:
        out_file.write_text(text, encoding="utf-8")
    except OSError as exc:
        raise BadInput(f"cannot write {out_file}: {exc}") from None
    console.print(f"proposed table written to {out_file}")

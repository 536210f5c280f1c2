"""Fleet-store commands of `station`: store init, publish, export (docs/fleet-store.md).

Registered on the main group by station/cli/main.py. The store is named by `--store URL` (a
libpq URL or conninfo); its password, if the URL holds one, is never printed: messages name
the store by host, port, database and user only.
"""

from __future__ import annotations

import contextlib
import dataclasses
from collections.abc import Iterator
from pathlib import Path
from typing import TYPE_CHECKING

import click
from rich.console import Console
from rich.progress import BarColumn, MofNCompleteColumn, Progress, TextColumn

from station.datalog.folder import DatalogError
from station.store.connect import StoreError, connect, shown

if TYPE_CHECKING:
    from station.config.shifts import ShiftCalendar
    from station.store.summary_sql import Engine, Selection

STORE_HELP = ("PostgreSQL store: a URL (postgresql://user@host:5432/db) or conninfo (service=NAME); "
              "the password may come from PGPASSWORD, ~/.pgpass or a service file.")


class BadInput(click.ClickException):
    exit_code = 2


@click.group("store")
def store_group() -> None:
    """The fleet store (PostgreSQL): create or migrate its tables."""


@store_group.command("init")
@click.argument("url")
def store_init(url: str) -> None:
    """Create the store's tables in an existing database, or migrate them to this version."""
    from station.store.schema import migrate

    with connect(url, autocommit=True) as conn:
        before, after = migrate(conn, shown(url))
    if before == after:
        click.echo(f"store {shown(url)}: schema version {after}, up to date")
    else:
        click.echo(f"store {shown(url)}: schema version {before} -> {after}")


@click.command("publish")
@click.argument("datalogs", nargs=-1, required=True, type=click.Path(path_type=Path))
@click.option("--store", "url", required=True, help=STORE_HELP)
@click.option("--batch-parts", type=click.IntRange(1, 1_000_000), default=2000, show_default=True,
              help="Parts per transaction (a kill loses at most one batch; the next publish resumes).")
def publish_command(datalogs: tuple[Path, ...], url: str, batch_parts: int) -> None:
    """Copy datalog folders (finished or still running) into the store; safe to repeat."""
    from station.store.publish import read_folder
    from station.store.schema import require_current

    console = Console(stderr=True)
    for folder in datalogs:                # every folder checked before the first write
        if not (folder / "lot.json").is_file():
            raise BadInput(f"{folder}: not a datalog folder (no lot.json)")
    # autocommit: each `conn.transaction()` of a batch is a real transaction, committed at its end.
    with connect(url, autocommit=True) as conn:
        require_current(conn, shown(url))
        with Progress(TextColumn("{task.description}"), BarColumn(), MofNCompleteColumn(),
                      console=console, transient=True) as progress:
            for folder in datalogs:
                try:
                    data = read_folder(folder)
                except DatalogError as exc:
                    raise BadInput(str(exc)) from None
                task = progress.add_task(f"publishing {folder.name}", total=len(data.parts))
                result = _publish(conn, url, data, batch_parts, lambda n, t=task: progress.update(t, completed=n))
                progress.remove_task(task)
                line = (f"{folder}: lot {result.lot_id} of station {result.station}: "
                        f"{result.parts_added} part(s) added, {result.parts_before} already in the store")
                if result.parts_replaced:
                    line += f", {result.parts_replaced} replaced (the folder was rewritten by a resume)"
                if result.held_back:
                    line += f", {result.held_back} under test left for later"
                click.echo(line)


def _publish(conn, url: str, data, batch_parts: int, after_batch):
    import psycopg

    from station.store.connect import scrub
    from station.store.publish import publish_folder

    try:
        return publish_folder(conn, data, batch_parts=batch_parts, after_batch=after_batch)
    except psycopg.Error as exc:
        raise StoreError(f"store {shown(url)}: {scrub(str(exc).strip().splitlines()[0], url)} "
                         f"(publishing {data.folder}; the parts committed so far are kept, "
                         "publish again to resume)") from None


def database_summary(datalogs: tuple[Path, ...], url: str | None, parquet: Path | None, window: Selection,
                     station: str | None, product: str | None, by: str | None, csv_file: Path | None,
                     html_file: Path | None, shifts: ShiftCalendar | None = None) -> None:
    """`station summary --store URL` or `--parquet DIR`: the summary (and report) computed by the database."""
    from station.review.console import print_summary
    from station.review.export import write_csv
    from station.store.summary_sql import summarise_sql

    if datalogs:
        raise BadInput("give either datalog folders or --store/--parquet, not both")
    if url is not None and parquet is not None:
        raise BadInput("give either --store or --parquet, not both")
    selection = dataclasses.replace(window, station=station, product=product)
    console = Console(width=None if Console().is_terminal else 160)
    with _database(url, parquet) as (engine, where):
        summary = summarise_sql(engine, selection, by=by, shifts=shifts)
        print_summary(summary, console)
        if html_file is not None:
            from station.review.report import render_report
            from station.store.report_sql import report_data_sql

            data = report_data_sql(engine, selection, summary, f"{where}: {selection.describe()}")
            try:
                render_report(data, summary, html_file)
            except OSError as exc:
                raise BadInput(f"cannot write: {exc}") from None
            console.print(f"report written to {html_file}")
    if csv_file is not None:
        try:
            write_csv(summary, csv_file)
        except OSError as exc:
            raise BadInput(f"cannot write: {exc}") from None
        console.print(f"figures written to {csv_file}")


@contextlib.contextmanager
def _database(url: str | None, parquet: Path | None) -> Iterator[tuple[Engine, str]]:
    """The engine over the store or the Parquet history, and its name for the report."""
    if url is None:
        assert parquet is not None
        from station.store.engines import duckdb_engine
        from station.store.parquet import open_history

        history = open_history(parquet)
        try:
            yield duckdb_engine(history), f"Parquet history {parquet}"
        finally:
            history.close()
        return
    import psycopg

    from station.store.connect import scrub
    from station.store.engines import postgres_engine
    from station.store.schema import require_current

    with connect(url, autocommit=True) as conn:
        require_current(conn, shown(url))
        try:
            yield postgres_engine(conn), f"store {shown(url)}"
        except psycopg.Error as exc:
            raise StoreError(f"store {shown(url)}: {scrub(str(exc).strip().splitlines()[0], url)}") from None


@click.command("export")
@click.argument("datalogs", nargs=-1, type=click.Path(path_type=Path))
@click.option("--store", "url", default=None, help="Export every lot of this store (else the folders given).")
@click.option("--to", "target", nargs=2, type=(click.Choice(["parquet"]), click.Path(file_okay=False, path_type=Path)),
              required=True, metavar="parquet DIR", help="Write Parquet history into DIR (by product and month).")
def export_command(datalogs: tuple[Path, ...], url: str | None, target: tuple[str, Path]) -> None:
    """Long history: datalog folders or the whole store as Parquet, partitioned by product and month."""
    from station.store.parquet import export, from_folder, from_store

    out = target[1]
    if bool(datalogs) == (url is not None):
        raise BadInput("give either datalog folders or --store URL (one source)")
    if out.exists() and not out.is_dir():
        raise BadInput(f"--to parquet {out}: exists and is not a folder")
    console = Console(stderr=True)
    lots = 0

    def told(lot, written) -> None:
        nonlocal lots
        lots += 1
        how = "written" if written.rewritten else f"{written.new_parts} new"
        console.print(f"lot {lot.lot['lot_id']} of {lot.lot['station']}: {written.parts} parts ({how}), "
                      f"{written.new_results} results written", markup=False, highlight=False)

    if url is None:
        for folder in datalogs:
            if not (folder / "lot.json").is_file():
                raise BadInput(f"{folder}: not a datalog folder (no lot.json)")

        def folders():
            for folder in datalogs:
                try:
                    yield from_folder(folder)
                except DatalogError as exc:
                    raise BadInput(str(exc)) from None

        rows = export(out, folders(), told)
    else:
        from station.store.schema import require_current

        with connect(url, autocommit=True) as conn:
            require_current(conn, shown(url))
            rows = export(out, from_store(conn), told)
    click.echo(f"{lots} lot(s), {rows} result rows written to {out}")

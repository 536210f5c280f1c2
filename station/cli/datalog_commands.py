"""`station convert` and `station verify`: the datalog folder commands.

The main `station` group registers `convert_command` and `verify_command`. Problems come
out as one clear line; `verify` exits 0 if the folder is intact, 1 if anything changed and
2 if the folder is not a datalog at all.
"""

from __future__ import annotations

from pathlib import Path

import click

from station.datalog.manifest import MANIFEST_NAME, NotADatalogError, record_file, verify_datalog
from station.datalog.stdf_export import DatalogError, write_stdf


class NotADatalog(click.ClickException):
    exit_code = 2


@click.command("convert")
@click.argument("datalog", type=click.Path(path_type=Path))
@click.option("--to", "target", type=click.Choice(["stdf"]), required=True,
              help="Output format: stdf (binary STDF V4).")
@click.option("--out", "out", type=click.Path(path_type=Path, dir_okay=False), default=None,
              help="Output file (default: DATALOG/lot.stdf).")
def convert_command(datalog: Path, target: str, out: Path | None) -> None:
    """Convert the datalog folder DATALOG to another format."""
    out_path = out if out is not None else datalog / "lot.stdf"
    inside = out_path.resolve().parent == datalog.resolve()
    # A file added to a sealed folder would show as "added" in verify: record it in the
    # manifest, but only when the folder was intact before (never re-sign damage).
    sealed = inside and (datalog / MANIFEST_NAME).is_file()
    intact_before = False
    if sealed:
        try:
            intact_before = verify_datalog(datalog).intact
        except NotADatalogError:
            intact_before = False
    try:
        path = write_stdf(datalog, out_path)
    except DatalogError as exc:
        raise click.ClickException(str(exc)) from None
    except OSError as exc:
        raise click.ClickException(f"{out_path}: cannot write ({exc.strerror or exc})") from None
    click.echo(f"wrote {path}")
    if sealed and intact_before:
        record_file(datalog, path.name, by="station convert")
        click.echo(f"recorded {path.name} in {MANIFEST_NAME}")
    elif sealed:
        click.echo(f"warning: {MANIFEST_NAME} not updated: the folder already differed from it "
                   "(run `station verify`)", err=True)


@click.command("verify")
@click.argument("datalog", type=click.Path(path_type=Path))
def verify_command(datalog: Path) -> None:
    """Check that no file of the datalog folder DATALOG changed since the lot ended."""
    try:
        report = verify_datalog(datalog)
    except NotADatalogError as exc:
        raise NotADatalog(str(exc)) from None
    except OSError as exc:
        raise click.ClickException(f"{datalog}: cannot be read ({exc.strerror or exc})") from None
    for line in report.messages():
        click.echo(line)
    if report.intact:
        click.echo(f"intact: {report.checked} files match {MANIFEST_NAME}")
        return
    click.echo(f"NOT intact: {len(report.messages())} problem(s) in {datalog}")
    raise SystemExit(1)

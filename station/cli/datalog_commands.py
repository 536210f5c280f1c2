"""`station convert` and `station verify`: the datalog folder commands.

The main `station` group registers `convert_command` and `verify_command`. Problems come out
as one line with the exit codes of station/errors.py: a folder that is not a datalog, or a
file in it that does not fit the format, is refused input (exit 2, the line names file, row
and what is wrong). `verify` exits 0 if the folder is intact and 2 if anything changed (each
finding on its own line first); `verify --seal` first seals a lot that ended but whose seal
(manifest.json) was never written, e.g. because the station was killed during the lot end.
"""

from __future__ import annotations

import functools
from collections.abc import Callable
from pathlib import Path
from typing import Any, TypeVar

import click

from station.datalog.folder import MANIFEST, SIM_TRUTH, DatalogError, read_lot_header
from station.datalog.manifest import record_file, verify_datalog
from station.datalog.seal import is_ended_unsealed, seal_datalog
from station.datalog.stdf_export import write_stdf
from station.errors import Refused, StationError, as_click_error

F = TypeVar("F", bound=Callable[..., Any])


def one_line_errors(command: F) -> F:
    """A StationError leaving the command becomes one `Error:` line with its exit code, also
    when the command runs on its own (not through the `station` group)."""

    @functools.wraps(command)
    def wrapper(*args: Any, **kwargs: Any) -> Any:
        try:
            return command(*args, **kwargs)
        except StationError as exc:
            raise as_click_error(exc) from None

    return wrapper  # type: ignore[return-value]


@click.command("convert")
@click.argument("datalog", type=click.Path(path_type=Path))
@click.option("--to", "target", type=click.Choice(["stdf"]), required=True,
              help="Output format: stdf (binary STDF V4).")
@click.option("--out", "out", type=click.Path(path_type=Path, dir_okay=False), default=None,
              help="Output file (default: DATALOG/lot.stdf).")
@one_line_errors
def convert_command(datalog: Path, target: str, out: Path | None) -> None:
    """Convert the datalog folder DATALOG to another format."""
    read_lot_header(datalog)          # refuses a folder that is not a datalog, before anything
    out_path = out if out is not None else datalog / "lot.stdf"
    inside = out_path.resolve().parent == datalog.resolve()
    # A file added to a sealed folder would show as "added" in verify: record it in the
    # manifest, but only when the folder was intact before (never re-sign damage).
    sealed = inside and (datalog / MANIFEST).is_file()
    intact_before = sealed and verify_datalog(datalog).intact
    try:
        path = write_stdf(datalog, out_path)
    except OSError as exc:
        raise DatalogError(f"cannot write ({exc.strerror or exc})", path=out_path) from None
    click.echo(f"wrote {path}")
    if sealed and intact_before:
        record_file(datalog, path.name, by="station convert")
        click.echo(f"recorded {path.name} in {MANIFEST}")
    elif sealed:
        click.echo(f"warning: {MANIFEST} not updated: the folder already differed from it "
                   "(run `station verify`)", err=True)


class NotIntact(Refused):
    """The folder differs from its manifest (the findings were printed above)."""


@click.command("verify")
@click.argument("datalog", type=click.Path(path_type=Path))
@click.option("--seal", is_flag=True,
              help="First seal a lot that ended but has no manifest.json (killed during its end).")
@one_line_errors
def verify_command(datalog: Path, seal: bool) -> None:
    """Check that no file of the datalog folder DATALOG changed since the lot ended."""
    if seal:
        _seal(datalog)
    try:
        report = verify_datalog(datalog)
    except OSError as exc:
        raise DatalogError(f"cannot be read ({exc.strerror or exc})", path=datalog) from None
    for line in report.messages():
        click.echo(line)
    if report.intact:
        click.echo(f"intact: {report.checked} files match {MANIFEST}")
        return
    raise NotIntact(f"NOT intact: {len(report.messages())} problem(s) in {datalog}")


def _seal(datalog: Path) -> None:
    header = read_lot_header(datalog)
    if (datalog / MANIFEST).exists():
        click.echo(f"already sealed ({MANIFEST} present)")
        return
    if not is_ended_unsealed(datalog):
        raise DatalogError("the lot has not ended (lot.json complete: false): nothing to seal",
                           path=datalog, hint=f"continue it with `station {header.get('mode', 'run')} --resume`")
    written = seal_datalog(datalog)
    click.echo(f"sealed: wrote {', '.join(written)}")
    if header.get("mode") == "dry-run" and not (datalog / SIM_TRUTH).exists():
        click.echo(f"note: sealed without {SIM_TRUTH}, the simulator's truth (`station dry-run --resume` "
                   "instead of `verify --seal` writes it)")


"""The station's exception tree and the exit code each branch maps to.

    0  EXIT_OK        done: the lot ran to its end, the command did what it was asked
    1  EXIT_SOFTWARE  the station itself failed (a bug, a full disk); one line says why
    2  EXIT_REFUSED   refused input (a bad file, option or folder): nothing powered, nothing written
    3  EXIT_STOPPED   the lot was stopped (instrument failure, Ctrl-C, SIGTERM): bench in its
                      safe state, the datalog holds every finished part, `--resume` continues it
    4  EXIT_CHECK_FAILED  `station bench check`: a check of the bench failed (one line each says
                      what to do); the bench was put in its safe state

Every error the station raises on purpose derives from StationError and carries its exit
code, so the command line maps an error to an exit code in one place (station/cli/main.py).
An exception that is not a StationError is a software error (exit 1). The table for users
is docs/exit-codes.md.
"""

from __future__ import annotations

from typing import TYPE_CHECKING

if TYPE_CHECKING:
    import click

EXIT_OK = 0
EXIT_SOFTWARE = 1
EXIT_REFUSED = 2
EXIT_STOPPED = 3
EXIT_CHECK_FAILED = 4


class StationError(Exception):
    """An error the station reports as one line; by itself a software error (exit 1)."""

    exit_code = EXIT_SOFTWARE


class Refused(StationError):
    """Bad input (a file, an option, a folder): refused before anything is powered or written.

    ConfigError (station/config/files.py) and DatalogError (station/datalog/folder.py) are
    the two kinds; the message is one line: file:line: key: what is wrong (how to fix)."""

    exit_code = EXIT_REFUSED


class Stopped(StationError):
    """The lot was stopped before its end; the bench is safe and the lot can be resumed."""

    exit_code = EXIT_STOPPED


def exit_code_of(exc: BaseException) -> int:
    """The exit code an exception ends the station with."""
    if isinstance(exc, StationError):
        return exc.exit_code
    if isinstance(exc, KeyboardInterrupt):
        return EXIT_STOPPED
    return EXIT_SOFTWARE


def one_line(text: str) -> str:
    """Escape line breaks and control characters (they may come from a file or an option),
    so that a message stays one line."""
    return "".join(c if c.isprintable() else c.encode("unicode_escape").decode("ascii") for c in text)


def as_click_error(exc: StationError) -> click.ClickException:
    """The error as click prints it ("Error: ..." on stderr), with the tree's exit code."""
    import click

    class StationClickError(click.ClickException):
        exit_code = exc.exit_code

    return StationClickError(one_line(str(exc)))

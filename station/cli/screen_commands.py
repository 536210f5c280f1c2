"""Outlier-screening commands: `station limits pat` (static PAT limits into a table) and
`station pat` (dynamic PAT offline over whole lots). See docs/outlier-screening.md."""

from __future__ import annotations

from pathlib import Path
from typing import Any

import click
from rich.table import Table

from station.cli.review_commands import HEAD, BadInput, _console, _read, _refuse_unwritable, _table
from station.review.units import fmt


@click.command("pat")
@click.argument("limits_file", metavar="LIMITS", type=click.Path(path_type=Path))
@click.option("--from", "datalogs", multiple=True, required=True, type=click.Path(path_type=Path),
              help="A datalog folder whose passing parts set the limits (repeat for several lots).")
@click.option("--sigma", "k", type=click.FloatRange(1.0, 20.0), default=6.0, show_default=True,
              help="Window half-width in robust sigma (IQR / 1.35).")
@click.option("--min-parts", type=click.IntRange(30, 10**7), default=30, show_default=True,
              help="Passing parts a figure needs before it gets a PAT limit.")
@click.option("--out", "out_file", required=True, type=click.Path(dir_okay=False, path_type=Path),
              help="Write the table with its PAT layer here.")
def limits_pat(limits_file: Path, datalogs: tuple[Path, ...], k: float, min_parts: int, out_file: Path) -> None:
    """Static PAT limits from passing parts: median +- SIGMA robust sigma, never looser than the spec."""
    from station.screen.pat_limits import PatError, parts_flagged, static_pat, write_pat_table

    _refuse_unwritable("--out", out_file)
    table = _table(limits_file)
    console = _console()
    logs = _read(datalogs, console)
    try:
        figures = static_pat(logs, table, k, min_parts)
        text, _new = write_pat_table(table, limits_file.read_text(encoding="utf-8"), figures, k, logs,
                                     str(out_file))
    except PatError as exc:
        raise BadInput(str(exc)) from None
    t = Table(title=f"PAT limits at {k:g} robust sigma (passing parts of {len(logs.folders)} datalog(s))",
              header_style=HEAD, title_justify="left")
    for c in ("figure", "n", "median", "robust sigma", "spec low", "PAT low", "PAT high", "spec high",
              "flagged", "soft bin"):
        t.add_column(c, justify="left" if c == "figure" else "right")
    for f in figures:
        t.add_row(f.label, str(f.count), fmt(f.median, f.units, 5, True), fmt(f.robust_sigma, f.units, 4, True),
                  fmt(f.spec_low, f.units, 5, True), fmt(f.low, f.units, 5, True), fmt(f.high, f.units, 5, True),
                  fmt(f.spec_high, f.units, 5, True), str(f.flagged), str(f.soft_bin))
    console.print(t)
    passing = int((logs.parts["PASS"] == 1).sum())
    console.print(f"{parts_flagged(logs, figures)} of {passing} passing input parts are outside at least one "
                  "PAT limit ('flagged' counts per figure; a part can break several)")
    try:
        out_file.write_text(text, encoding="utf-8")
    except OSError as exc:
        raise BadInput(f"cannot write {out_file}: {exc}") from None
    console.print(f"table with PAT layer written to {out_file}")


def fixture_fault_options(texts: tuple[str, ...]) -> tuple:
    """--fixture-fault texts as the simulator's fixture faults; a bad one is refused (exit 2)."""
    from sim_instruments.fixture_faults import parse_fixture_fault
    from station.errors import Refused

    faults = []
    for text in texts:
        try:
            faults.append(parse_fixture_fault(text))
        except ValueError as exc:
            raise Refused(f"--fixture-fault {text}: {exc}") from None
    return tuple(faults)


def ask_pause(alarm: Any, live: list) -> str:
    """The operator's answer at a lot-control pause (the bench is in its safe state meanwhile)."""
    choices = ["continue", "skip", "stop"] if alarm.site is not None else ["continue", "stop"]
    site = f" (skip: site {alarm.site} is not tested any more)" if alarm.site is not None else ""
    text = f"LOT PAUSED ({alarm.rule}): {alarm.message}\nbench in safe state; {', '.join(choices)}{site}?"

    def prompt() -> str:
        try:
            return str(click.prompt(text, type=click.Choice(choices), default="stop"))
        except click.Abort:          # input closed: the safe answer
            return "stop"

    return str(live[0].ask(prompt)) if live else prompt()


def register(main: click.Group, limits_group: click.Group) -> None:
    limits_group.add_command(limits_pat)

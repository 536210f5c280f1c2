"""`station budget DATALOG --app FILE`: the error budget of every part of a lot already tested
in a customer's applications (reads the datalog only, never the instruments).

Registered on the main `station` group by station/cli/main.py. Bad input is one line and
exit code 2, as for every review command.
"""

from __future__ import annotations

import math
from pathlib import Path

import click
from rich.table import Table

from station.cli.review_commands import BadInput
from station.config.applications import load_applications
from station.config.files import ConfigError
from station.config.quantities import format_quantity, parse_quantity
from station.review.budget import (
    budget_distribution,
    check_against_lot,
    datalog_budgets,
    lot_context,
)
from station.review.load import DatalogError, load_datalogs
from station.review.units import fmt, fmt_share

HEAD = "bold dark_cyan"


def distribution_table(title: str, distribution, within: float | None = None, budgets=None) -> Table:
    """Per application: parts, p50/p99/max of the direct sum and RSS (and the share within a bound)."""
    table = Table(title=title, header_style=HEAD, title_justify="left")
    columns = ["application", "parts", "no budget", "direct p50", "direct p99", "direct max",
               "RSS p50", "RSS p99", "RSS max"] + ([f"direct <= {format_quantity(within, 'V')}"] if within else [])
    for i, column in enumerate(columns):
        table.add_column(column, justify="left" if i == 0 else "right")
    for row in distribution.itertuples(index=False):
        cells = [row.application, str(row.parts), str(row.none)]
        cells += [fmt(getattr(row, c), "V", with_unit=True) for c in
                  ("direct_p50", "direct_p99", "direct_max", "rss_p50", "rss_p99", "rss_max")]
        if within is not None and budgets is not None:
            mine = budgets[budgets["application"] == row.application]["app_err"]
            cells.append(fmt_share(float((mine <= within).mean()) if len(mine) else math.nan))
        table.add_row(*cells)
    return table


@click.command("budget")
@click.argument("datalog", type=click.Path(path_type=Path))
@click.option("--app", "app_file", type=click.Path(path_type=Path), required=True,
              help="Application file (YAML): the circuits to budget, see sequences/px401_apps.yaml.")
@click.option("--within", default=None, help="Also show the share of parts whose direct sum is within this, e.g. '60 uV'.")
@click.option("--csv", "csv_file", type=click.Path(dir_okay=False, path_type=Path), default=None,
              help="Write every part's budget (each term, direct sum, RSS; volts) to this CSV.")
def budget_command(datalog: Path, app_file: Path, within: str | None, csv_file: Path | None) -> None:
    """Input-referred error of every part of a tested lot in each application of FILE."""
    try:
        bound = parse_quantity(within, "V") if within is not None else None
    except ValueError as exc:
        raise BadInput(f"--within {within!r}: {exc}") from None
    if csv_file is not None and not csv_file.parent.is_dir():
        raise BadInput(f"--csv {csv_file}: the folder {csv_file.parent} does not exist (create it, or write elsewhere)")
    try:
        applications = load_applications(app_file)
        logs = load_datalogs([datalog])
        context = lot_context(Path(datalog), applications)
        check_against_lot(applications, logs.results, context, app_file)
    except (ConfigError, DatalogError) as exc:
        raise BadInput(str(exc)) from None
    budgets = datalog_budgets(logs.results, context)
    if csv_file is not None:
        budgets.to_csv(csv_file, index=False)
    title = (f"Error budget per application (input-referred), {datalog}: "
             f"{budgets['PART_ID'].nunique()} measured parts, tested at a {context.span_v:g} V span")
    from rich.console import Console

    Console(width=None if Console().is_terminal else 160).print(
        distribution_table(title, budget_distribution(budgets), bound, budgets))

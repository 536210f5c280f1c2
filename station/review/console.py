"""The end-of-shift summary as rich tables on the terminal."""

from __future__ import annotations

import math

import pandas as pd
from rich.console import Console
from rich.table import Table

from station.review.summary import Summary
from station.review.units import display_unit, fmt, fmt_share
from station.screen.review import screen_tables

HEAD = "bold dark_cyan"
FLAG = "bold dark_orange"


def _table(title: str, *columns: str, right_from: int = 1) -> Table:
    table = Table(title=title, title_style="bold", header_style=HEAD, title_justify="left")
    for i, column in enumerate(columns):
        table.add_column(column, justify="right" if i >= right_from else "left")
    return table


def _num(value: float, digits: int = 4) -> str:
    if value is None or (isinstance(value, float) and math.isnan(value)):
        return ""
    return f"{value:.{digits}g}"


def print_summary(summary: Summary, console: Console) -> None:
    for table in summary_tables(summary):
        console.print(table)
    if summary.screening is not None:
        for table in screen_tables(summary.screening):
            console.print(table)
    console.print(f"Site difference: {summary.site_test.describe()}")
    console.print(f"Limits for Cpk: {summary.limits_source}")
    console.print("Yield = good / (good + failed); tester faults have no pass/fail and are left out. "
                  "Bin shares are of all parts tested.")
    for note in summary.notes:
        console.print(f"[{FLAG}]note:[/] {note}")


def summary_tables(summary: Summary) -> list[Table]:
    tables = [overview_table(summary), grade_table(summary), bins_table("Hard bins", summary.hard_bins),
              bins_table("Soft bins", summary.soft_bins), pareto_table(summary), sites_table(summary)]
    if summary.by_table is not None and summary.by:
        tables.append(by_table(summary))
    tables += [stats_table(summary), cpk_table(summary)]
    if summary.budgets is not None:
        from station.cli.budget_commands import distribution_table

        tables.append(distribution_table("Application error budget (input-referred), per application",
                                         summary.budgets))
    return tables


def overview_table(summary: Summary) -> Table:
    table = _table("Lot summary", "figure", "value")
    for key, value in summary.overview.items():
        if key in ("yield", "final yield"):
            text = fmt_share(float(value))
        elif isinstance(value, float):
            text = _num(value, 5)
        else:
            text = str(value)
        table.add_row(key, text)
    return table


def grade_table(summary: Summary) -> Table:
    table = _table("Yield per grade", "grade", "parts", "yield")
    for row in summary.grades.itertuples():
        table.add_row(str(row.grade), str(row.parts), fmt_share(row.share))
    return table


def bins_table(title: str, frame: pd.DataFrame) -> Table:
    table = _table(title, "bin", "name", "pass", "count", "share", right_from=3)
    for row in frame.itertuples():
        table.add_row(str(row.bin), str(row.name), "yes" if row._3 else "no", str(row.count), fmt_share(row.share))
    return table


def pareto_table(summary: Summary) -> Table:
    table = _table("Failure Pareto (soft bins of failed parts and tester faults)",
                   "soft bin", "name", "count", "share of tested", "cumulative", right_from=2)
    for row in summary.pareto.itertuples():
        table.add_row(str(row.bin), str(row.name), str(row.count), fmt_share(row.share), fmt_share(row.cumulative))
    return table


def sites_table(summary: Summary) -> Table:
    table = _table("Yield per site (p: Fisher's exact test of the site against the others)",
                   "site", "tested", "good", "failed", "faults", "yield", "p vs rest", "")
    for row in summary.sites.itertuples():
        flag = f"[{FLAG}]differs[/]" if row.differs else ""
        table.add_row(str(row.site), str(row.tested), str(row.good), str(row.failed), str(row.faults),
                      fmt_share(row._6), _num(row.p_vs_rest, 3), flag)
    return table


def by_table(summary: Summary) -> Table:
    frame = summary.by_table
    assert frame is not None and summary.by is not None
    columns = list(frame.columns)
    table = _table(f"Yield by {summary.by}", *columns)
    for values in frame.itertuples(index=False):
        cells = []
        for column, value in zip(columns, values, strict=True):
            cells.append(fmt_share(value) if column.startswith("yield") else str(value))
        table.add_row(*cells)
    return table


def stats_table(summary: Summary) -> Table:
    table = _table("Distributions of computed results (over-range values counted, not averaged)",
                   "parameter", "region", "unit", "count", "over-range", "mean", "sigma", "min", "p1",
                   "p50", "p99", "max", right_from=3)
    for row in summary.stats.itertuples():
        label = display_unit(row.units)[1]
        values = [fmt(getattr(row, c), row.units) for c in ("mean", "sigma", "min", "p1", "p50", "p99", "max")]
        table.add_row(row.param, row.region, label, str(row.count), str(row.over_range), *values)
    return table


def cpk_table(summary: Summary) -> Table:
    grades = summary.grade_order or sorted(summary.cpk["grade"].unique())
    columns = []
    for grade in grades:
        columns += [f"{grade} LSL", f"{grade} USL", f"{grade} Cpk"]
    table = _table("Capability per grade: Cpk = min(USL - mu, mu - LSL) / (3 sigma)",
                   "parameter", "region", "unit", *columns, right_from=3)
    for (param, region), group in summary.cpk.groupby(["param", "region"], sort=False):
        units = str(group["units"].iloc[0])   # V/V where a rejection figure is judged on its slope
        cells = []
        for grade in grades:
            row = group[group["grade"] == grade]
            if row.empty:
                cells += ["", "", ""]
                continue
            r = row.iloc[0]
            value = r["cpk"]
            style = FLAG if not math.isnan(value) and value < 1.33 else ""
            text = _num(value, 3)
            cells += [fmt(r["lsl"], units), fmt(r["usl"], units), f"[{style}]{text}[/]" if style and text else text]
        slope = " (slope)" if (group["basis"] == "slope").any() else ""
        table.add_row(str(param) + slope, str(region), display_unit(units)[1], *cells)
    return table

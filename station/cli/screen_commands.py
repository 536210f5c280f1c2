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


def pat_preset(table: Any, folder: Path | None) -> tuple[list, str] | None:
    """Dynamic PAT limits from an earlier lot (`--pat-baseline`), or None for the lot's own baseline."""
    if folder is None:
        return None
    from station.review.load import load_datalogs
    from station.screen.dynamic_pat import limits_from
    from station.screen.pat_limits import figure_values
    from station.screen.pat_table import MIN_BASELINE

    if table.pat is None or table.pat.dynamic is None:
        raise BadInput(f"--pat-baseline {folder}: the limit table {table.source} has no pat.dynamic section "
                       "(add one: baseline, sigma, soft_bin)")
    logs = load_datalogs([folder])
    values = figure_values(logs)
    grouped: dict[tuple[str, str | None], list[float]] = {}
    for row in values.itertuples(index=False):
        grouped.setdefault((str(row.PARAM), str(row.REGION) or None), []).append(float(row.RESULT))
    passing = int((logs.parts["PASS"] == 1).sum())
    if passing < max(MIN_BASELINE, table.pat.dynamic.baseline):
        raise BadInput(f"--pat-baseline {folder}: {passing} passing parts, the baseline needs at least "
                       f"{max(MIN_BASELINE, table.pat.dynamic.baseline)}")
    lot = logs.lots[0].get("lot_id", folder)
    return limits_from(grouped, table), f"previous lot {lot} ({passing} passing parts, {folder})"


@click.command("pat")
@click.argument("datalogs", nargs=-1, required=True, type=click.Path(path_type=Path))
@click.option("--sigma", "k", type=click.FloatRange(1.0, 20.0), default=6.0, show_default=True,
              help="Window half-width in robust sigma (IQR / 1.35).")
@click.option("--limits", "limits_file", type=click.Path(path_type=Path), default=None,
              help="Limit table with a pat: section [default: each datalog's own limits.yaml].")
def pat_command(datalogs: tuple[Path, ...], k: float, limits_file: Path | None) -> None:
    """Dynamic PAT over whole lots, offline: limits per lot, its outliers, and the re-bin they would make."""
    from station.review.limits import datalog_table
    from station.review.rebin import RebinError, bin_comparison
    from station.screen.offline import offline_pat
    from station.screen.pat_limits import PatError

    console = _console()
    given = _table(limits_file) if limits_file is not None else None
    for folder in datalogs:
        logs = _read((folder,), console)
        table = given or datalog_table(logs, 0)
        if table is None:
            raise BadInput(f"{folder}: its limits.yaml is missing or unreadable (give --limits)")
        try:
            found = offline_pat(logs, table, k)
        except (PatError, RebinError) as exc:
            raise BadInput(str(exc)) from None
        lot = logs.lots[0].get("lot_id", folder)
        t = Table(title=f"{lot}: dynamic PAT limits at {k:g} robust sigma (parts that passed a grade)",
                  header_style=HEAD, title_justify="left")
        for c in ("figure", "n", "low", "high"):
            t.add_column(c, justify="left" if c == "figure" else "right")
        for lim in found.limits:
            t.add_row(lim.param + (f" {lim.region}" if lim.region else ""), str(found.counts[(lim.param, lim.region)]),
                      fmt(lim.low, lim.units, 5, True), fmt(lim.high, lim.units, 5, True))
        console.print(t)
        outliers = found.outliers(logs)
        t = Table(title=f"{lot}: outliers ({len(outliers)})", header_style=HEAD, title_justify="left")
        for c in ("part", "site", "figure", "value", "low", "high"):
            t.add_column(c)
        units = {lim.param: lim.units for lim in found.limits}
        for pid, site, figure, value, low, high in outliers:
            u = units.get(figure.split()[0], "")
            t.add_row(pid, str(site), figure, fmt(value, u, 5, True), fmt(low, u, 5, True), fmt(high, u, 5, True))
        console.print(t)
        frame = bin_comparison(found.result, "HARD_BIN")
        t = Table(title=f"{lot}: hard bins if re-binned with these limits", header_style=HEAD, title_justify="left")
        for c in ("bin", "name", "before", "after", "change"):
            t.add_column(c, justify="left" if c in ("bin", "name") else "right")
        names = {n: b.name for n, b in found.table.hard_bins.items()}
        for row in frame.itertuples():
            t.add_row(str(row.bin), names.get(int(row.bin), ""), str(row.before), str(row.after), f"{row.change:+d}")
        console.print(t)
        console.print(f"{found.result.moved()} of {len(found.result.after)} parts would change bin.")


def register(main: click.Group, limits_group: click.Group) -> None:
    limits_group.add_command(limits_pat)
    main.add_command(pat_command)

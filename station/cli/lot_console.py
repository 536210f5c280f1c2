"""What the operator sees: the progress line while a lot runs, and the bin summary at its end."""

from __future__ import annotations

from collections.abc import Callable

from rich.console import Console
from rich.progress import BarColumn, MofNCompleteColumn, Progress, TextColumn, TimeElapsedColumn
from rich.table import Table

from station.config.limit_tables import LimitTable
from station.datalog.writer import PartRecord
from station.lot.runner import LotTally


class LotProgress:
    """A progress bar with parts done, yield so far and parts per hour."""

    def __init__(self, console: Console, total: int | None, lot_id: str) -> None:
        self.progress = Progress(
            TextColumn(f"[bold]{lot_id}[/]"), BarColumn(), MofNCompleteColumn(),
            TextColumn("yield {task.fields[yield_pct]:5.1f} %"),
            TextColumn("{task.fields[pph]:6.0f} parts/h"), TimeElapsedColumn(),
            console=console, transient=False, disable=not console.is_terminal and total is None)
        self.task = self.progress.add_task("lot", total=total, yield_pct=0.0, pph=0.0)

    def __enter__(self) -> LotProgress:
        self.progress.start()
        return self

    def __exit__(self, *exc) -> None:
        self.progress.stop()

    def ask(self, question: Callable[[], str]) -> str:
        """Ask the operator with the live bar stopped, so the typed answer gets a line of its own."""
        self.progress.stop()
        try:
            return question()
        finally:
            self.progress.start()

    def update(self, record: PartRecord, tally: LotTally) -> None:
        self.progress.update(self.task, completed=tally.parts, yield_pct=tally.yield_pct,
                             pph=tally.parts_per_hour)


def bin_summary(tally: LotTally, table: LimitTable) -> list[Table]:
    """Hard-bin and soft-bin tables with counts and shares of the lot."""
    total = max(tally.parts, 1)
    hard = Table(title="Hard bins", title_justify="left")
    for column in ("bin", "name", "P/F", "parts", "share"):
        hard.add_column(column, justify="right" if column in ("bin", "parts", "share") else "left")
    for number, bin_def in sorted(table.hard_bins.items()):
        count = tally.hard_bins.get(number, 0)
        hard.add_row(str(number), bin_def.name, "P" if bin_def.passing else "F", str(count),
                     f"{100.0 * count / total:.1f} %")
    soft = Table(title="Soft bins (parts seen)", title_justify="left")
    for column in ("bin", "name", "P/F", "parts", "share"):
        soft.add_column(column, justify="right" if column in ("bin", "parts", "share") else "left")
    for number, count in sorted(tally.soft_bins.items(), key=lambda item: (-item[1], item[0])):
        soft_def = table.soft_bins.get(number)
        soft.add_row(str(number), soft_def.name if soft_def else "?", "P" if soft_def and soft_def.passing else "F",
                     str(count), f"{100.0 * count / total:.1f} %")
    return [hard, soft]


def lot_line(tally: LotTally) -> str:
    judged = tally.parts - tally.tester_faults
    grades = ", ".join(f"grade {g}: {n}" for g, n in sorted(tally.grades.items())) or "no good parts"
    return (f"{tally.parts} parts, {tally.good} good of {judged} judged ({tally.yield_pct:.1f} %; {grades}); "
            f"tester faults {tally.tester_faults}, retests {tally.retests}, "
            f"{tally.parts_per_hour:.0f} parts/h")

"""The change records of a limit table (`changes:`), as a table for the console."""

from __future__ import annotations

from collections.abc import Sequence
from typing import Any

from rich.table import Table


def history_table(changes: Sequence[dict[str, Any]], title: str) -> Table:
    table = Table(title=title, header_style="bold dark_cyan", title_justify="left")
    for column in ("when", "who", "what", "old", "new", "why"):
        table.add_column(column)
    for record in changes:
        table.add_row(*(str(record.get(c, "")) for c in ("when", "who", "what", "old", "new", "why")))
    if not changes:
        table.add_row("", "", "no change records", "", "", "")
    return table

"""Following parts.csv as it grows: only the bytes appended since the last look are read.

The writer appends one whole part row per write (station/datalog/writer.py), so a reader can
see at most a torn last line, which is left for the next look. A file that got shorter (a
resumed lot cuts it back to whole parts) is read again from its start.
"""

from __future__ import annotations

import csv
import io
from pathlib import Path

from station.datalog.folder import PART_CELLS, PART_COLUMNS, DatalogError, check_row


class PartsFollower:
    """The rows of one parts.csv, read incrementally; each row checked against the format."""

    def __init__(self, path: Path) -> None:
        self.path = Path(path)
        self.rows: list[list[str]] = []
        self._offset = 0          # bytes of whole lines taken so far
        self._lines = 0           # lines taken (the header included), for error messages

    def poll(self) -> bool:
        """Take the whole lines appended since the last poll; True if any were taken or the
        file went back to its start. DatalogError for a damaged row (file, line, column)."""
        try:
            size = self.path.stat().st_size
        except FileNotFoundError:
            changed = bool(self.rows) or self._offset > 0
            self._reset()
            return changed
        if size < self._offset:
            self._reset()
        if size == self._offset:
            return False
        with open(self.path, "rb") as handle:
            handle.seek(self._offset)
            data = handle.read(size - self._offset)
        end = data.rfind(b"\n") + 1
        if end == 0:
            return False
        text = data[:end].decode("utf-8", errors="replace")
        reader = csv.reader(io.StringIO(text, newline=""))
        new: list[list[str]] = []
        for row in reader:
            line = self._lines + reader.line_num
            if not row:
                continue
            if self._lines == 0 and reader.line_num == 1:
                if row != PART_COLUMNS:
                    raise DatalogError("the first line is not the parts.csv column header",
                                       path=self.path, line=1, hint="see docs/datalog-format.md")
                continue
            check_row(self.path, line, row, PART_COLUMNS, PART_CELLS)
            new.append(row)
        self.rows.extend(new)     # all of the new lines or none (a damaged row raises above)
        self._lines += text.count("\n")
        self._offset += end
        return True

    def _reset(self) -> None:
        self.rows = []
        self._offset = 0
        self._lines = 0

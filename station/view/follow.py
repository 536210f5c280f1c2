"""Following parts.csv as it grows: only the bytes appended since the last look are read.

The writer appends one whole part row per write (station/datalog/writer.py), so a reader can
see at most a torn last line, which is left for the next look. A file that got shorter (a
resumed lot cuts it back to whole parts) or was replaced (the lot end's RESCREEN marks are an
atomic rewrite: a new file) is read again from its start.
"""

from __future__ import annotations

import csv
import io
from pathlib import Path

from station.datalog.folder import (
    PART_CELLS,
    PARTS_CSV,
    DatalogError,
    check_row,
    columns_of,
    upgrade_row,
    version_of_columns,
)


class PartsFollower:
    """The rows of one parts.csv, read incrementally; each row checked against the format."""

    def __init__(self, path: Path) -> None:
        self.path = Path(path)
        self.rows: list[list[str]] = []
        self._offset = 0          # bytes of whole lines taken so far
        self._lines = 0           # lines taken (the header included), for error messages
        self._file: tuple[int, int] | None = None   # (device, inode) of the file read
        self._columns: list[str] = []               # the header line's format version's columns

    def poll(self) -> bool:
        """Take the whole lines appended since the last poll; True if any were taken or the
        file went back to its start. DatalogError for a damaged row (file, line, column)."""
        try:
            stat = self.path.stat()
        except FileNotFoundError:
            changed = bool(self.rows) or self._offset > 0
            self._reset()
            return changed
        size, file = stat.st_size, (stat.st_dev, stat.st_ino)
        replaced = self._file is not None and file != self._file
        if size < self._offset or replaced:
            self._reset()
        self._file = file
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
                version = version_of_columns(PARTS_CSV, row)
                if version is None:
                    raise DatalogError("the first line is not the parts.csv column header",
                                       path=self.path, line=1, hint="see docs/datalog-format.md")
                self._columns = columns_of(PARTS_CSV, version)
                continue
            check_row(self.path, line, row, self._columns, PART_CELLS)
            new.append(upgrade_row(row, PARTS_CSV))
        self.rows.extend(new)     # all of the new lines or none (a damaged row raises above)
        self._lines += text.count("\n")
        self._offset += end
        return True

    def _reset(self) -> None:
        self.rows = []
        self._offset = 0
        self._lines = 0
        self._file = None

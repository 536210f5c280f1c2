"""Editing a limit table in place: the file's comments, order and layout kept (ruamel.yaml
round trip), the whole table checked again before anything is written, and a change record
appended under `changes:` (what, old, new, who, when, why).

Used by `station limits set` (one limit) and `station limits guard` (a guard-banded copy).
"""

from __future__ import annotations

import getpass
import json
import os
import time
from dataclasses import dataclass, field
from pathlib import Path
from typing import Any

from ruamel.yaml import YAML
from ruamel.yaml.comments import CommentedMap, CommentedSeq
from ruamel.yaml.error import YAMLError

from station.config.files import ConfigError
from station.config.limit_tables import LimitTable, parse_limit_table


def _yaml() -> YAML:
    return YAML(typ="rt")     # round-trip mode: keeps the line and column of every node


@dataclass
class EditableTable:
    """A limit table file read for a round trip. ruamel.yaml tells where every key and value
    sits; edits replace or insert text at those places only, so every other byte of the file
    (comments, alignment, quoting) stays as it was."""

    path: Path
    text: str
    data: CommentedMap
    edits: list[tuple[int, int, int, str]] = field(default_factory=list)  # line, col, end col, text
    appended: list[str] = field(default_factory=list)

    def grade_entry(self, grade: str) -> tuple[int, CommentedMap]:
        grades = self.data.get("grades")
        if not isinstance(grades, CommentedSeq):
            raise ConfigError(self.path, "no grades list", key="grades")
        names = []
        for i, entry in enumerate(grades):
            if isinstance(entry, CommentedMap):
                names.append(str(entry.get("name")))
                if str(entry.get("name")) == grade:
                    return i, entry
        raise ConfigError(self.path, f"no grade {grade!r}", key="grades",
                          hint=f"grades: {', '.join(names)}")

    def limit_entry(self, grade: str, param: str, region: str | None) -> tuple[int, CommentedMap]:
        _, entry = self.grade_entry(grade)
        for j, limit in enumerate(entry.get("limits") or []):
            if (isinstance(limit, CommentedMap) and limit.get("param") == param
                    and (limit.get("region") or None) == region):
                return j, limit
        what = param + (f" region {region}" if region else "")
        raise ConfigError(self.path, f"grade {grade!r} has no {what} limit", key="grades",
                          hint="add the entry by hand first (limits set changes existing limits)")

    def set_value(self, entry: CommentedMap, key: str, value: str, before: str = "soft_bin") -> None:
        """Give `key` of a mapping the YAML text `value`: replaced where the key is, else
        inserted just before the key `before`."""
        lines = self.text.splitlines()
        if key in entry:
            line, col = entry.lc.value(key)
            self.edits.append((line, col, _value_end(lines[line], col), value))
            return
        line, col = entry.lc.key(before)
        if entry.fa.flow_style():
            self.edits.append((line, col, col, f"{key}: {value}, "))
        else:
            self.edits.append((line, 0, 0, " " * col + f"{key}: {value}\n"))

    def add_change(self, what: str, old: Any, new: Any, why: str, who: str | None = None) -> None:
        fields = {"what": what, "old": old, "new": new, "who": who or _who(),
                  "when": time.strftime("%Y-%m-%dT%H:%M:%SZ", time.gmtime()), "why": why}
        # JSON strings are YAML double-quoted scalars: any text is safe.
        self.appended.append("  - {" + ", ".join(f"{k}: {json.dumps(v)}" for k, v in fields.items()) + "}")

    def render(self) -> str:
        lines = self.text.splitlines(keepends=True)
        for line, col, end, value in sorted(self.edits, key=lambda e: (e[0], e[1]), reverse=True):
            lines[line] = lines[line][:col] + value + lines[line][end:]
        text = "".join(lines)
        if self.appended:
            if not text.endswith("\n"):
                text += "\n"
            if "changes" not in self.data:
                text += "\nchanges:                 # appended by station limits set / limits guard\n"
            elif list(self.data)[-1] != "changes":
                raise ConfigError(self.path, "changes: is not the last key of the file", key="changes",
                                  hint="move the changes: list to the end of the file")
            text += "\n".join(self.appended) + "\n"
        return text

    def validated(self, target: Path | None = None) -> tuple[str, LimitTable]:
        """The new text and the table it gives; a ConfigError (file:line of the new text,
        which is the file's line where a value changed) if the edit breaks the table."""
        text = self.render()
        return text, parse_limit_table(text, str(target or self.path))


def _value_end(line: str, col: int) -> int:
    """End column of the scalar that starts at `col` (flow or block, plain or quoted)."""
    if line[col:col + 1] in ("'", '"'):
        quote, i = line[col], col + 1
        while i < len(line):
            if line[i] == quote:
                if quote == "'" and line[i + 1:i + 2] == "'":
                    i += 2
                    continue
                return i + 1
            i += 2 if quote == '"' and line[i] == "\\" else 1
        return len(line)
    i = col
    while i < len(line) and line[i] not in ",}]" and not (line[i] == "#" and line[i - 1] in " \t"):
        i += 1
    while i > col and line[i - 1] in " \t":
        i -= 1
    return i


def read_editable(path: Path) -> EditableTable:
    try:
        text = Path(path).read_text(encoding="utf-8")
    except OSError as exc:
        raise ConfigError(path, f"cannot read: {exc.strerror or exc}") from None
    yaml = _yaml()
    try:
        data = yaml.load(text)
    except YAMLError as exc:
        mark = getattr(exc, "problem_mark", None)
        raise ConfigError(path, f"not valid YAML: {getattr(exc, 'problem', exc)}",
                          line=mark.line + 1 if mark else None) from None
    if not isinstance(data, CommentedMap):
        raise ConfigError(path, "a limit table is a mapping (product:, regions:, grades: ...)")
    parse_limit_table(text, str(path))   # the table as it is must be valid to start with
    return EditableTable(Path(path), text, data)


def write_text(path: Path, text: str) -> None:
    """Write via a temporary file and rename, so a crash leaves the old file or the new one."""
    temp = path.with_name(f".{path.name}.tmp")
    with open(temp, "w", encoding="utf-8") as handle:
        handle.write(text)
        handle.flush()
        os.fsync(handle.fileno())
    os.replace(temp, path)


def _who() -> str:
    try:
        return getpass.getuser()
    except (OSError, KeyError):
        return "unknown"


def grade_order_problems(table: LimitTable) -> list[tuple[str, str, str | None, str]]:
    """(grade, param, region, why) for every limit of a grade that is looser than the same
    limit of the next grade (grades are listed best first; a better grade is never looser)."""
    problems = []
    for better, worse in zip(table.grades, table.grades[1:], strict=False):
        theirs = {(lim.param, lim.region): lim for lim in worse.limits}
        for mine in better.limits:
            other = theirs.get((mine.param, mine.region))
            if other is None:
                continue
            if mine.low is not None and other.low is not None and mine.low < other.low:
                problems.append((better.name, mine.param, mine.region,
                                 f"low {mine.low:g} {mine.units} is looser than grade {worse.name}'s {other.low:g}"))
            if mine.high is not None and other.high is not None and mine.high > other.high:
                problems.append((better.name, mine.param, mine.region,
                                 f"high {mine.high:g} {mine.units} is looser than grade {worse.name}'s {other.high:g}"))
    return problems


def yaml_scalar(text: str) -> str:
    """`text` as a YAML value for a flow mapping: plain where that is safe, else double-quoted."""
    import re

    if re.fullmatch(r"[A-Za-z0-9_.+\-/ ]+", text) and text.strip() == text and text:
        return text
    return json.dumps(text)

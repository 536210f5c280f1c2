"""A SCPI command tree: keyword patterns, header resolution, and compound-message dispatch.

Patterns are written as in instrument manuals: "[SOURce:]VOLTage[:LEVel][:IMMediate]".
Upper-case letters are the short form, the whole keyword the long form, both case-insensitive;
bracketed nodes are optional. A `;`-separated message is run unit by unit; a unit without a
leading ':' is resolved from the subsystem of the previous unit (SCPI-1999 vol. 1, 6.2.4),
and common commands ('*IDN?') leave that path unchanged.
"""

from __future__ import annotations

import re
from collections.abc import Callable
from dataclasses import dataclass, field

from sim_instruments.scpi_errors import ScpiError
from sim_instruments.scpi_params import NO_ARGUMENTS, Arguments, split_top_level, tokenize

Handler = Callable[..., str | None]

_PATTERN_PART = re.compile(r"\[:?([A-Za-z]+):?\]|([A-Za-z]+)")
_HEADER = re.compile(r"^(:?)([A-Za-z][A-Za-z0-9]*(?::[A-Za-z][A-Za-z0-9]*)*)(\?)?(?:\s+(.*))?$",
                     re.DOTALL)
_COMMON = re.compile(r"^\*([A-Za-z]+)(\?)?(?:\s+(.*))?$", re.DOTALL)


@dataclass
class Entry:
    handler: Handler
    arguments: Arguments


@dataclass(eq=False)
class Node:
    """One keyword of the tree; may carry a command, a query, and children at the same time."""

    keyword: str
    optional: bool = False
    children: list[Node] = field(default_factory=list)
    command: Entry | None = None
    query: Entry | None = None

    @property
    def short(self) -> str:
        return "".join(c for c in self.keyword if c.isupper() or c.isdigit()).upper()

    def matches(self, mnemonic: str) -> bool:
        upper = mnemonic.upper()
        return upper == self.short or upper == self.keyword.upper()

    def child(self, keyword: str, optional: bool) -> Node:
        for node in self.children:
            if node.keyword == keyword:
                if node.optional != optional:
                    raise ValueError(f"{keyword} is both optional and required in the tree")
                return node
        node = Node(keyword, optional)
        self.children.append(node)
        return node


def pattern_keywords(pattern: str) -> list[tuple[str, bool]]:
    """'[SOURce:]VOLTage[:LEVel]' -> [('SOURce', True), ('VOLTage', False), ('LEVel', True)]."""
    parts = [(opt or req, bool(opt)) for opt, req in _PATTERN_PART.findall(pattern)]
    if not parts:
        raise ValueError(f"empty SCPI pattern {pattern!r}")
    return parts


@dataclass
class Resolution:
    entry: Entry
    path: Node  # the subsystem a following relative command is resolved from


class CommandTree:
    """Commands and queries by pattern, plus '*' common commands."""

    def __init__(self) -> None:
        self.root = Node("")
        self._common: dict[str, Entry] = {}

    def add(self, pattern: str, command: Handler | None = None, query: Handler | None = None,
            args: Arguments = NO_ARGUMENTS, query_args: Arguments = NO_ARGUMENTS) -> None:
        node = self.root
        for keyword, optional in pattern_keywords(pattern):
            node = node.child(keyword, optional)
        if command is not None:
            node.command = Entry(command, args)
        if query is not None:
            node.query = Entry(query, query_args)

    def add_common(self, name: str, handler: Handler, args: Arguments = NO_ARGUMENTS) -> None:
        """`name` like '*IDN?' or '*RST'."""
        self._common[name.upper()] = Entry(handler, args)

    def resolve(self, start: Node, mnemonics: list[str], is_query: bool) -> Resolution | None:
        return _walk(start, mnemonics, 0, is_query, start)

    def run_message(self, message: str, on_error: Callable[[ScpiError], None]) -> list[str]:
        """Run the units of one program message. Command errors (-1xx) abandon the rest of
        the message, as IEEE 488.2 parsers do; execution errors only skip their own unit."""
        replies: list[str] = []
        path = self.root
        try:
            units = split_top_level(message, ";")
        except ScpiError as exc:
            on_error(exc)
            return replies
        for raw in units:
            unit = raw.strip()
            if not unit:
                continue
            try:
                reply, path = self._run_unit(unit, path)
            except ScpiError as exc:
                on_error(exc)
                if -200 < exc.code <= -100:
                    break
                continue
            if reply is not None:
                replies.append(reply)
        return replies

    def _run_unit(self, unit: str, path: Node) -> tuple[str | None, Node]:
        if unit.startswith("*"):
            match = _COMMON.match(unit)
            if not match:
                raise ScpiError(-102, f"bad common command {unit!r}")
            name = "*" + match.group(1).upper() + ("?" if match.group(2) else "")
            entry = self._common.get(name)
            if entry is None:
                raise ScpiError(-113, name)
            return self._call(entry, match.group(3) or ""), path
        match = _HEADER.match(unit)
        if not match:
            raise ScpiError(-102, f"cannot read {unit!r}")
        absolute, header, question, data = match.groups()
        start = self.root if absolute else path
        mnemonics = header.split(":")
        found = self.resolve(start, mnemonics, bool(question))
        if found is None:
            raise ScpiError(-113, header)
        return self._call(found.entry, data or ""), found.path

    @staticmethod
    def _call(entry: Entry, data: str) -> str | None:
        values = entry.arguments.convert(tokenize(data))
        return entry.handler(*values)


def _walk(node: Node, mnemonics: list[str], index: int, is_query: bool,
          parent_of_last: Node) -> Resolution | None:
    """Depth-first match of mnemonics[index:] below `node`; optional nodes may be skipped."""
    if index == len(mnemonics):
        entry = node.query if is_query else node.command
        if entry is not None:
            return Resolution(entry, parent_of_last)
        for child in node.children:
            if child.optional:
                found = _walk(child, mnemonics, index, is_query, parent_of_last)
                if found:
                    return found
        return None
    for child in node.children:
        if child.matches(mnemonics[index]):
            found = _walk(child, mnemonics, index + 1, is_query, node)
            if found:
                return found
        if child.optional:
            found = _walk(child, mnemonics, index, is_query, parent_of_last)
            if found:
                return found
    return None

"""Load YAML configuration files with line numbers, and report problems as one clear line.

Every configuration file (bench, sequence, limit table) goes through `load_yaml_file`, so a
syntax error and a schema error both come out as ``file:line: where: what is wrong (how to fix)``.
"""

from __future__ import annotations

from collections.abc import Sequence
from dataclasses import dataclass
from pathlib import Path
from typing import Any, TypeVar

import yaml
from pydantic import BaseModel, ValidationError


class ConfigError(Exception):
    """A configuration file is wrong: says which file, which line and key, what, and how to fix."""

    def __init__(self, file: str | Path, message: str, *, line: int | None = None,
                 key: str | None = None, hint: str | None = None) -> None:
        self.file = str(file)
        self.line = line
        self.key = key
        self.message = message
        self.hint = hint
        super().__init__(self.one_line())

    def one_line(self) -> str:
        where = self.file if self.line is None else f"{self.file}:{self.line}"
        text = f"{where}: "
        if self.key:
            text += f"{self.key}: "
        text += self.message
        if self.hint:
            text += f" ({self.hint})"
        return _one_line(text)


def _one_line(text: str) -> str:
    """Keys and values from the file may hold line breaks or control characters: escape them,
    so the message stays one line."""
    return "".join(c if c.isprintable() else c.encode("unicode_escape").decode("ascii") for c in text)


@dataclass
class YamlDocument:
    """Parsed YAML data plus the node tree, so any key path can be traced back to its line."""

    file: str
    data: Any
    root: yaml.Node | None

    def line_of(self, path: Sequence[str | int]) -> int | None:
        """1-based line of the deepest node reachable along `path` (None if nothing matches)."""
        node = self.root
        line = node.start_mark.line + 1 if node is not None else None
        for step in path:
            if isinstance(node, yaml.MappingNode):
                found = None
                for key_node, value_node in node.value:
                    if str(key_node.value) == str(step):
                        found = value_node
                        line = key_node.start_mark.line + 1
                        break
                if found is None:
                    return line
                node = found
            elif isinstance(node, yaml.SequenceNode) and isinstance(step, int):
                if not 0 <= step < len(node.value):
                    return line
                node = node.value[step]
                line = node.start_mark.line + 1
            else:
                return line
        return line

    def error(self, path: Sequence[str | int], message: str, hint: str | None = None) -> ConfigError:
        """A ConfigError pointing at `path` in this document."""
        key = format_key_path(path) if path else None
        return ConfigError(self.file, message, line=self.line_of(path), key=key, hint=hint)


def format_key_path(path: Sequence[str | int]) -> str:
    text = ""
    for step in path:
        text += f"[{step}]" if isinstance(step, int) else (f".{step}" if text else str(step))
    return text


def load_yaml_file(path: str | Path) -> YamlDocument:
    """Read a YAML file; a missing file or a syntax error becomes a ConfigError with its line."""
    file = str(path)
    try:
        text = Path(path).read_text(encoding="utf-8")
    except FileNotFoundError:
        raise ConfigError(file, "file not found", hint="check the path") from None
    except (OSError, UnicodeDecodeError) as exc:
        raise ConfigError(file, f"cannot read file: {exc}") from None
    return parse_yaml_text(text, file)


def parse_yaml_text(text: str, file: str = "<text>") -> YamlDocument:
    try:
        root = yaml.compose(text, Loader=yaml.SafeLoader)
        data = yaml.safe_load(text)
    except yaml.MarkedYAMLError as exc:
        mark = exc.problem_mark or exc.context_mark
        line = mark.line + 1 if mark is not None else None
        problem = exc.problem or exc.context or "invalid YAML"
        raise ConfigError(file, f"YAML syntax error: {problem}", line=line,
                          hint="fix the indentation, quoting or punctuation on that line") from None
    except yaml.YAMLError as exc:
        raise ConfigError(file, f"YAML syntax error: {exc}") from None
    return YamlDocument(file=file, data=data, root=root)


M = TypeVar("M", bound=BaseModel)


def validate_model(doc: YamlDocument, model: type[M], *, context: dict | None = None) -> M:
    """Validate a document against a pydantic model; the first problem becomes a ConfigError."""
    if not isinstance(doc.data, dict):
        raise ConfigError(doc.file, "expected a mapping of keys at the top level",
                          line=1, hint="see the example files shipped with the station")
    try:
        return model.model_validate(doc.data, context=context)
    except ValidationError as exc:
        first = exc.errors()[0]
        path = [p for p in first["loc"] if isinstance(p, str | int)]
        message = first["msg"]
        if first["type"] == "extra_forbidden":
            message = "unknown key"
            hint = "check the spelling; see the example files for the keys allowed here"
        elif first["type"] == "missing":
            message = "required key is missing"
            hint = "add it"
        else:
            hint = None
        raise doc.error(path, message, hint) from None

"""Load YAML configuration files with line numbers, and report problems as one clear line.

Every configuration file (bench, sequence, limit table) goes through `load_yaml_file`, so a
syntax error, a key written twice and a schema error all come out as
``file:line: where: what is wrong (how to fix)``. The schemas are pydantic models
(`validate_model`); the field types they share are in station/config/fields.py.
"""

from __future__ import annotations

import types
import typing
from collections.abc import Sequence
from dataclasses import dataclass
from pathlib import Path
from typing import Any, TypeVar

import yaml
from pydantic import BaseModel, ValidationError

from station.errors import Refused


class ConfigError(Refused):
    """A configuration file is wrong: says which file, which line and key, what, and how to fix.
    A refused input (exit 2, station/errors.py)."""

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

    def node_at(self, path: Sequence[str | int]) -> tuple[yaml.Node | None, int | None, list[str | int]]:
        """The deepest node reachable along `path`, its 1-based line (of the key, for a mapping
        entry), and the steps that were reached, mapping keys as text and list items as ints."""
        node = self.root
        line = node.start_mark.line + 1 if node is not None else None
        reached: list[str | int] = []
        for step in path:
            if isinstance(node, yaml.MappingNode):
                found = None
                for key_node, value_node in node.value:
                    if str(key_node.value) == str(step):
                        found = value_node
                        line = key_node.start_mark.line + 1
                        break
                if found is None:
                    break
                node = found
                reached.append(str(step))
            elif isinstance(node, yaml.SequenceNode) and isinstance(step, int) and not isinstance(step, bool):
                if not 0 <= step < len(node.value):
                    break
                node = node.value[step]
                line = node.start_mark.line + 1
                reached.append(step)
            else:
                break
        return node, line, reached

    def line_of(self, path: Sequence[str | int]) -> int | None:
        """1-based line of the deepest node reachable along `path` (None if nothing matches)."""
        return self.node_at(path)[1]

    def error(self, path: Sequence[str | int], message: str, hint: str | None = None) -> ConfigError:
        """A ConfigError pointing at `path` in this document."""
        _, line, reached = self.node_at(path)
        # Steps found in the file are named as written there (a mapping key "2" is `.2`, not a
        # list index); the rest of the path (a key that is missing) as given.
        named = [*reached, *path[len(reached):]]
        key = format_key_path(named) if named else None
        return ConfigError(self.file, message, line=line, key=key, hint=hint)


def format_key_path(path: Sequence[str | int]) -> str:
    text = ""
    for step in path:
        if isinstance(step, int) and not isinstance(step, bool):
            text += f"[{step}]"
        else:
            text += f".{step}" if text else str(step)
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


_MERGE_TAG = "tag:yaml.org,2002:merge"


def parse_yaml_text(text: str, file: str = "<text>") -> YamlDocument:
    """Parse once: the node tree (for line numbers and repeated keys), then the data from it."""
    loader: yaml.SafeLoader | None = None
    try:
        loader = yaml.SafeLoader(text)   # reading the stream may refuse a control character
        root = loader.get_single_node()
        if root is not None:
            _refuse_repeated_keys(loader, root, file)
        data = loader.construct_document(root) if root is not None else None
    except yaml.MarkedYAMLError as exc:
        mark = exc.problem_mark or exc.context_mark
        line = mark.line + 1 if mark is not None else None
        problem = exc.problem or exc.context or "invalid YAML"
        raise ConfigError(file, f"YAML syntax error: {problem}", line=line,
                          hint="fix the indentation, quoting or punctuation on that line") from None
    except yaml.YAMLError as exc:
        raise ConfigError(file, f"YAML syntax error: {exc}") from None
    finally:
        if loader is not None:
            loader.dispose()
    return YamlDocument(file=file, data=data, root=root)


def _refuse_repeated_keys(loader: yaml.SafeLoader, root: yaml.Node, file: str) -> None:
    """A key written twice in one mapping: YAML would silently keep the second (a second
    `safety:` block replacing the first), so it is refused at the line of the second."""
    seen_nodes: set[int] = set()  # an alias reuses a node: check each once
    pending: list[tuple[yaml.Node, list[str | int]]] = [(root, [])]
    while pending:
        node, path = pending.pop()
        if id(node) in seen_nodes:
            continue
        seen_nodes.add(id(node))
        if isinstance(node, yaml.SequenceNode):
            pending.extend((item, [*path, i]) for i, item in enumerate(node.value))
        elif isinstance(node, yaml.MappingNode):
            first_line: dict[Any, int] = {}
            for key_node, value_node in node.value:
                if key_node.tag == _MERGE_TAG:
                    continue
                # 2 and '2' are one key to the station (bins are read as text keys too).
                key = str(loader.construct_object(key_node, deep=True))
                line = key_node.start_mark.line + 1
                try:
                    earlier = first_line.get(key)
                except TypeError:  # an unhashable key: construct_document says so, with its line
                    continue
                if earlier is not None:
                    raise ConfigError(file, f"written twice (first at line {earlier}); YAML would "
                                      "silently keep only the second", line=line,
                                      key=format_key_path([*path, str(key)]),
                                      hint="keep one of them, or merge the two")
                first_line[key] = line
                pending.append((value_node, [*path, str(key)]))


M = TypeVar("M", bound=BaseModel)


def validate_model(doc: YamlDocument, model: type[M], *, context: dict[str, Any] | None = None,
                   data: Any = None, at: Sequence[str | int] = ()) -> M:
    """Validate the document (or `data`, found at path `at` in it) against a pydantic model;
    the first problem becomes a ConfigError naming its line and key."""
    value = doc.data if data is None and not at else data
    if not isinstance(value, dict):
        if not at:
            raise ConfigError(doc.file, "expected a mapping of keys at the top level",
                              line=1, hint="see the example files shipped with the station")
        raise doc.error(at, "expected a mapping of keys", "indent the keys below it")
    try:
        return model.model_validate(value, context=context)
    except ValidationError as exc:
        raise config_error_of(doc, exc, model, at) from None


def config_error_of(doc: YamlDocument, exc: ValidationError, model: type[BaseModel],
                    at: Sequence[str | int] = ()) -> ConfigError:
    """The first error of a pydantic validation as a ConfigError; an unknown key goes first,
    since a misspelt key (`settel:`) also explains the missing one it was meant to be."""
    errors = exc.errors()
    first = next((e for e in errors if e["type"] == "extra_forbidden"), errors[0])
    loc = [p for p in first["loc"] if isinstance(p, str | int) and p != "[key]"]
    message, hint = first["msg"], None
    context = first.get("ctx") or {}
    if first["type"] == "config":
        hint = context.get("hint") or None
    elif first["type"] == "extra_forbidden":
        message = "unknown key"
        allowed = _allowed_keys(model, loc[:-1])
        hint = (f"allowed here: {', '.join(allowed)}" if allowed else
                "check the spelling; see the example files for the keys allowed here")
    elif first["type"] == "missing":
        message = f"required key {loc[-1]!r} is missing" if loc else "required key is missing"
        example = _EXAMPLES.get(str(loc[-1])) if loc else None
        hint = f"add it, e.g. {example}" if example else "add it"
        loc = loc[:-1]
    return doc.error([*at, *loc], message, hint)


# Examples for a missing key, in the hint.
_EXAMPLES = {"span": "span: 10 V", "levels": "levels: [-4 V, 4 V]", "spans": "spans: [8 V, 12 V]"}


def _allowed_keys(model: type[BaseModel], loc: Sequence[str | int]) -> list[str]:
    """The keys the model allows at `loc` (empty if the way there cannot be followed)."""
    current: Any = model
    for step in loc:
        current = _inner(current, step)
        if current is None:
            return []
    current = _inner(current, None)
    if not (isinstance(current, type) and issubclass(current, BaseModel)):
        return []
    return sorted(field.alias or name for name, field in current.model_fields.items())


def _inner(annotation: Any, step: str | int | None) -> Any:
    """The annotation one step into `annotation` (a model field, list item, dict value)."""
    while True:
        origin = typing.get_origin(annotation)
        if origin is typing.Annotated:
            annotation = typing.get_args(annotation)[0]
        elif origin in (typing.Union, types.UnionType):
            options = [a for a in typing.get_args(annotation) if a is not type(None)]
            if len(options) != 1:
                return None
            annotation = options[0]
        else:
            break
    if step is None:
        return annotation
    if isinstance(annotation, type) and issubclass(annotation, BaseModel) and isinstance(step, str):
        for name, field in annotation.model_fields.items():
            if step in (name, field.alias):
                return field.annotation
        return None
    args = typing.get_args(annotation)
    if origin in (list, tuple) and args:
        return args[0]
    if origin is dict and len(args) == 2:
        return args[1]
    return None

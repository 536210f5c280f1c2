"""Application files: the customer circuits whose error budget the station computes per part.

One YAML file lists applications (buffer, non-inverting or inverting gain stage), each with
its supply, input range, source resistance and output swing; `load_applications` checks it
and returns station/judge/budget `Application` records. Every problem is one line,
``file:line: key: what is wrong (how to fix)``. See applications/px401_apps.yaml.
"""

from __future__ import annotations

import re
from pathlib import Path
from typing import Any, Literal

from pydantic import BaseModel, ConfigDict, Field, StrictStr

from station.config.files import YamlDocument, load_yaml_file, parse_yaml_text, validate_model
from station.config.quantities import parse_quantity
from station.judge.budget import Application

# Names become the REGION of their rows in the datalog: short and plain.
_NAME = re.compile(r"^[A-Za-z][A-Za-z0-9_-]{0,23}$")
MAX_GAIN = 10_000.0
MAX_SOURCE_OHM = 10e9


class _Model(BaseModel):
    model_config = ConfigDict(extra="forbid")


class _RangeModel(_Model):
    low: Any
    high: Any


class _AppModel(_Model):
    name: StrictStr
    circuit: Literal["buffer", "non_inverting", "inverting"]
    gain: float | None = Field(None, strict=False)
    supply: _RangeModel
    input: _RangeModel
    source_resistance: Any = 0.0
    output: _RangeModel | None = None
    reference: Any = None


class _FileModel(_Model):
    note: StrictStr = ""
    applications: list[_AppModel] = Field(min_length=1)


def load_applications(path: str | Path) -> tuple[Application, ...]:
    return _build(load_yaml_file(path))


def parse_applications(text: str, file: str = "<text>") -> tuple[Application, ...]:
    return _build(parse_yaml_text(text, file))


def _build(doc: YamlDocument) -> tuple[Application, ...]:
    model = validate_model(doc, _FileModel)
    apps: list[Application] = []
    for i, entry in enumerate(model.applications):
        path: list[str | int] = ["applications", i]
        if not _NAME.match(entry.name):
            raise doc.error([*path, "name"], f"{entry.name!r} is not a plain name",
                            "a letter, then up to 23 letters, digits, '_' or '-'")
        if any(a.name == entry.name for a in apps):
            raise doc.error([*path, "name"], f"application {entry.name!r} is named twice", "give each its own name")
        apps.append(_application(doc, path, entry))
    return tuple(apps)


def _volts(doc: YamlDocument, path: list[str | int], value: Any) -> float:
    try:
        return parse_quantity(value, "V")
    except ValueError as exc:
        raise doc.error(path, str(exc)) from None


def _range(doc: YamlDocument, path: list[str | int], value: _RangeModel) -> tuple[float, float]:
    low, high = _volts(doc, [*path, "low"], value.low), _volts(doc, [*path, "high"], value.high)
    if low > high:
        raise doc.error([*path, "low"], f"low {low:g} V is above high {high:g} V", "swap low and high")
    return low, high


def _application(doc: YamlDocument, path: list[str | int], entry: _AppModel) -> Application:
    supply = _range(doc, [*path, "supply"], entry.supply)
    if supply[1] - supply[0] <= 0:
        raise doc.error([*path, "supply"], "the supply span must be above zero", "e.g. {low: 0 V, high: 5 V}")
    inputs = _range(doc, [*path, "input"], entry.input)
    if entry.circuit == "buffer":
        if entry.gain not in (None, 1, 1.0):
            raise doc.error([*path, "gain"], "a buffer has gain 1", "remove gain:, or use circuit: non_inverting")
        gain = 1.0
    else:
        if entry.gain is None:
            raise doc.error(path, f"a {entry.circuit} stage needs a gain", "e.g. gain: 10")
        gain = entry.gain
        low_gain = 1.0 if entry.circuit == "non_inverting" else 0.0
        if not low_gain <= gain <= MAX_GAIN or (entry.circuit == "inverting" and gain <= 0):
            raise doc.error([*path, "gain"], f"gain {gain:g} is outside {low_gain:g} to {MAX_GAIN:g}"
                            + (" (above zero)" if entry.circuit == "inverting" else ""),
                            "write |Vout / Vin|, e.g. gain: 10")
    reference = (supply[0] + supply[1]) / 2.0
    if entry.reference is not None:
        if entry.circuit != "inverting":
            raise doc.error([*path, "reference"], "only an inverting stage has a fixed reference",
                            "remove reference:")
        reference = _volts(doc, [*path, "reference"], entry.reference)
    common = inputs if entry.circuit != "inverting" else (reference, reference)
    for v in common:
        if not supply[0] <= v <= supply[1]:
            key = "input" if entry.circuit != "inverting" else "reference"
            raise doc.error([*path, key], f"common mode {v:g} V is outside the supply {supply[0]:g} V to "
                            f"{supply[1]:g} V", "keep the amplifier's inputs within its rails")
    if entry.output is not None:
        output = _range(doc, [*path, "output"], entry.output)
    elif entry.circuit == "inverting":
        output = (reference - gain * (inputs[1] - reference), reference - gain * (inputs[0] - reference))
    else:
        output = (gain * inputs[0], gain * inputs[1])
    if output[0] < supply[0] - 1e-9 or output[1] > supply[1] + 1e-9:
        raise doc.error([*path, "output" if entry.output is not None else "input"],
                        f"output swing {output[0]:g} V to {output[1]:g} V leaves the supply "
                        f"{supply[0]:g} V to {supply[1]:g} V", "narrow the input range or give output:")
    try:
        source = parse_quantity(entry.source_resistance, "Ohm")
    except ValueError as exc:
        raise doc.error([*path, "source_resistance"], str(exc)) from None
    if not 0 <= source <= MAX_SOURCE_OHM:
        raise doc.error([*path, "source_resistance"], f"{source:g} Ohm is outside 0 to 10 GOhm",
                        "e.g. source_resistance: 10 kOhm")
    return Application(entry.name, entry.circuit, gain, supply, inputs, source, output, reference)

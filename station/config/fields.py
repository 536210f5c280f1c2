"""Pydantic field types shared by the config schemas (bench, sequence, limit tables, test kinds).

Each validator reads one value as written in a file and checks it is sane: quantities are
finite, of the entry's dimension and inside a range (`Annotated[float, quantity("V", gt=0,
le=30)]`), counts are whole numbers in a range, texts are not empty. A refusal is a pydantic error of type "config" whose
message says what is wrong and whose context carries the hint; station/config/files.py turns
it into ``file:line: key: what (hint)``.
"""

from __future__ import annotations

import math
from typing import Annotated, Any, NoReturn

from pydantic import BaseModel, BeforeValidator, ConfigDict
from pydantic_core import PydanticCustomError

from station.config.quantities import example_for, format_quantity, parse_quantity
from station.config.rail_points import RailPoint, parse_rail_point


def refuse(what: str, hint: str | None = None) -> NoReturn:
    """Refuse the value being validated: `what` is wrong, `hint` says how to fix it."""
    raise PydanticCustomError("config", "{what}", {"what": what, "hint": hint or ""})


class Strict(BaseModel):
    """A section of a config file: unknown keys are refused, records are frozen."""

    model_config = ConfigDict(extra="forbid", frozen=True)


def _range_text(unit: str, low: float | None, high: float | None, low_open: bool) -> str:
    def show(value: float) -> str:
        return format_quantity(value, unit) if unit else f"{value:g}"
    parts = []
    if low is not None:
        parts.append(f"above {show(low)}" if low_open else f"at least {show(low)}")
    if high is not None:
        parts.append(f"at most {show(high)}")
    if low is not None and high is not None and not low_open:
        return f"from {show(low)} to {show(high)}"
    return " and ".join(parts)


def check_range(value: float, unit: str, *, ge: float | None = None, gt: float | None = None,
                le: float | None = None, why: str = "") -> float:
    """`value` if inside the range, else a refusal saying the range and why it is that."""
    low = gt if gt is not None else ge
    bad_low = (gt is not None and not value > gt) or (ge is not None and not value >= ge)
    bad_high = le is not None and not value <= le
    shown = format_quantity(value, unit) if unit else f"{value:g}"
    if gt == 0 and bad_low:  # the sign is the likelier mistake: named before the range
        refuse(f"must be above zero, got {shown}", "write a positive value")
    if bad_low or bad_high:
        reason = f" ({why})" if why else ""
        refuse(f"{shown} is outside the allowed range: must be "
               f"{_range_text(unit, low, le, gt is not None)}{reason}",
               f"write a value {_range_text(unit, low, le, gt is not None)}")
    return value


def quantity(unit: str, *, ge: float | None = None, gt: float | None = None, le: float | None = None,
             why: str = "") -> BeforeValidator:
    """The validator of a field (`Annotated[float, quantity(...)]`) holding a quantity in
    `unit` ("V", "A", "Ohm", "s", "Hz", "V/V", "dB") as an
    SI float, finite and inside the given bounds (`why` says where the bounds come from)."""

    def convert(value: Any) -> float:
        try:
            number = parse_quantity(value, unit)
        except ValueError as exc:
            refuse(str(exc), f"write it like {example_for(unit)!r}")
        return check_range(number, unit, ge=ge, gt=gt, le=le, why=why)

    return BeforeValidator(convert)


def plain_float(value: Any) -> float | None:
    """A number written without a unit (a YAML number or a numeric text), else None."""
    if isinstance(value, int | float) and not isinstance(value, bool):
        return float(value)
    if isinstance(value, str):
        try:
            return float(value)
        except ValueError:
            return None
    return None


def plain_number(*, ge: float | None = None, gt: float | None = None, le: float | None = None,
                 why: str = "") -> BeforeValidator:
    """The validator of a field (`Annotated[float, plain_number(...)]`) holding a plain
    number (no unit), finite and inside the given bounds."""

    def convert(value: Any) -> float:
        number = plain_float(value)
        if number is None or not math.isfinite(number):
            refuse(f"expected a plain finite number, got {value!r}", "write it without a unit, e.g. 2")
        return check_range(number, "", ge=ge, gt=gt, le=le, why=why)

    return BeforeValidator(convert)


def count(low: int, high: int, why: str = "") -> BeforeValidator:
    """The validator of a field (`Annotated[int, count(...)]`): a whole number from `low`
    to `high`."""

    def convert(value: Any) -> int:
        if isinstance(value, bool) or not isinstance(value, int) or not low <= value <= high:
            reason = f" ({why})" if why else ""
            refuse(f"expected a whole number from {low} to {high}{reason}, got {value!r}",
                   f"write a number from {low} to {high}")
        return value

    return BeforeValidator(convert)


def _flag(value: Any) -> bool:
    if not isinstance(value, bool):
        refuse(f"expected true or false, got {value!r}", "write true or false")
    return value


def _text(value: Any) -> str:
    if not isinstance(value, str) or not value.strip():
        refuse(f"expected a non-empty text, got {value!r}", "write a name")
    return value.strip()


Flag = Annotated[bool, BeforeValidator(_flag)]
Text = Annotated[str, BeforeValidator(_text)]


def rail_point(max_offset_v: float, why: str = "") -> BeforeValidator:
    """The validator of a field (`Annotated[RailPoint, rail_point(...)]`) holding a
    common-mode point written against the rails ("V+ - 1.3 V")."""

    def convert(value: Any) -> RailPoint:
        try:
            point = parse_rail_point(value)
        except ValueError as exc:
            refuse(str(exc), "write it like 'V- - 0.1 V', 'V+ - 1.3 V' or 'mid + 1 V'")
        check_range(abs(point.offset_v), "V", le=max_offset_v,
                    why=why or "distance of the point from its rail")
        return point

    return BeforeValidator(convert)

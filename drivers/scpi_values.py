"""Turning numbers into SCPI program data and SCPI replies back into numbers."""

from __future__ import annotations

import math
import re

# SCPI-1999 reports an overload (and "not a number") as 9.9E37.
SCPI_OVERLOAD = 9.9e37


def scpi_number(value: float) -> str:
    """A float as SCPI numeric program data: enough digits for a microvolt on 1000 V."""
    if not math.isfinite(value):
        raise ValueError(f"cannot send {value!r} to an instrument")
    text = f"{value:.10g}"
    return "0" if text == "-0" else text


# SCPI numeric response data (IEEE 488.2 NR1, NR2 and NR3: integer, decimal, exponent), with
# or without a sign, then optionally a unit where the instrument writes one ("1.5E-03 A").
_NUMBER = re.compile(r"^\s*(?P<number>[+-]?(?:\d+(?:\.\d*)?|\.\d+)(?:[eE][+-]?\d+)?)"
                     r"\s*(?P<unit>[A-Za-z]+)?\s*$")


def parse_scpi_float(text: str, unit: str | None = None) -> float:
    """Parse one numeric reply; overload (|x| >= 9.9E37) becomes +-inf. ValueError if not a number.

    A unit after the number is accepted only when the caller says which one it expects
    (`unit`, e.g. "V"), and must be that one: "1.5E-03 A" where volts are expected is wrong."""
    match = _NUMBER.match(text)
    if match is None:
        raise ValueError(f"{text!r} is not a number")
    suffix = match.group("unit")
    if suffix is not None and (unit is None or suffix.upper() != unit.upper()):
        wanted = f"a number in {unit}" if unit else "a plain number"
        raise ValueError(f"{text!r} has unit {suffix!r} where {wanted} was expected")
    value = float(match.group("number"))
    if abs(value) >= SCPI_OVERLOAD * (1 - 1e-9):
        return math.copysign(math.inf, value)
    return value


def parse_scpi_bool(text: str) -> bool:
    """Parse a boolean reply: 1/0 (also written +1, 1.0, ...) or ON/OFF."""
    word = text.strip().upper()
    if word in ("ON", "OFF"):
        return word == "ON"
    try:
        value = parse_scpi_float(word)
    except ValueError:
        raise ValueError(f"{text!r} is not a boolean reply") from None
    if value in (0.0, 1.0):
        return value == 1.0
    raise ValueError(f"{text!r} is not a boolean reply")


def parse_error_entry(text: str) -> tuple[int, str]:
    """Parse a SYST:ERR? reply like '-113,"Undefined header"' or '+0,"No error"' into
    (code, message); the message may also come without its quotes."""
    code_text, _, message = text.strip().partition(",")
    code = int(code_text.strip())
    return code, message.strip().strip('"')

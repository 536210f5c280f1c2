"""Turning numbers into SCPI program data and SCPI replies back into numbers."""

from __future__ import annotations

import math

# SCPI-1999 reports an overload (and "not a number") as 9.9E37.
SCPI_OVERLOAD = 9.9e37


def scpi_number(value: float) -> str:
    """A float as SCPI numeric program data: enough digits for a microvolt on 1000 V."""
    if not math.isfinite(value):
        raise ValueError(f"cannot send {value!r} to an instrument")
    text = f"{value:.10g}"
    return "0" if text == "-0" else text


def parse_scpi_float(text: str) -> float:
    """Parse one numeric reply; overload (|x| >= 9.9E37) becomes +-inf. ValueError if not a number."""
    value = float(text.strip())
    if math.isnan(value):
        raise ValueError(f"{text!r} is not a number")
    if abs(value) >= SCPI_OVERLOAD * (1 - 1e-9):
        return math.copysign(math.inf, value)
    return value


def parse_scpi_bool(text: str) -> bool:
    """Parse a boolean reply (1/0, ON/OFF)."""
    word = text.strip().upper()
    if word in ("1", "ON"):
        return True
    if word in ("0", "OFF"):
        return False
    raise ValueError(f"{text!r} is not a boolean reply")


def parse_error_entry(text: str) -> tuple[int, str]:
    """Parse a SYST:ERR? reply like '-113,"Undefined header"' into (code, message)."""
    code_text, _, message = text.strip().partition(",")
    code = int(code_text)
    return code, message.strip().strip('"')

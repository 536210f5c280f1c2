"""Quantities with units in configuration files ("50 uV", "100 kOhm", "120 dB"), via pint.

Everything inside the station is plain floats in SI base units (V, A, Ohm, s, Hz) or dB;
units exist only at the edges (files, screens), and this module is that edge.

A quantity is a number and at most one unit: the number is read by Python's float, the unit
by pint, and nothing is evaluated as an expression (so "9**9**9 V" is refused, not computed).
Whatever comes out is finite: "nan V", "1e400 s" and ".inf" are refused here, for every key.
"""

from __future__ import annotations

import math
import re
from functools import lru_cache

import pint

# Base unit names as written in our files and datalogs, with the pint unit they mean.
_BASE_UNITS: dict[str, str] = {
    "V": "volt",
    "A": "ampere",
    "Ohm": "ohm",
    "s": "second",
    "Hz": "hertz",
    "V/V": "volt / volt",
}
_NUMBER = r"[-+]?(?:\d+\.?\d*|\.\d+)(?:[eE][-+]?\d+)?|[-+]?(?:nan|inf|infinity)"
# A unit: letters (with the micro and ohm signs), optionally "/" and more letters ("uV/V"), or %.
_QUANTITY = re.compile(rf"^\s*({_NUMBER})\s*([A-Za-zµμΩ]+(?:\s*/\s*[A-Za-zµμΩ]+)?|%)?\s*$",
                       re.IGNORECASE)
_DECIBEL_UNIT = re.compile(r"^dB$")


@lru_cache(maxsize=1)
def _registry() -> pint.UnitRegistry:
    # pint's own disk cache of its parsed definitions makes this 0.2 s shorter after the first
    # start; where the user's cache folder cannot be written, the definitions are parsed again.
    try:
        return pint.UnitRegistry(autoconvert_offset_to_baseunit=True, cache_folder=":auto:")
    except OSError:
        return pint.UnitRegistry(autoconvert_offset_to_baseunit=True)


@lru_cache(maxsize=512)
def _unit_factor(unit_text: str, unit: str) -> float:
    """Factor from `unit_text` ("uV", "kOhm") to `unit`; ValueError if it is not that dimension."""
    registry = _registry()
    name = re.sub(r"(?i)ohms?|Ω", "ohm", unit_text).replace("µ", "u").replace("μ", "u")
    name = "percent" if name == "%" else name
    try:
        written = registry.Quantity(1.0, registry.parse_units(name))
    except Exception:
        raise ValueError(f"unknown unit {unit_text!r}") from None
    target = registry.Quantity(1.0, _BASE_UNITS[unit])
    if unit != "V/V" and written.dimensionless:
        # "10 percent" is no voltage: a dimensionless unit is never read as the entry's unit.
        raise ValueError(f"{unit_text!r} is a dimensionless unit")
    if written.dimensionality != target.dimensionality:
        raise ValueError(f"{unit_text!r} is not a unit of {unit}")
    return float(written.to(target.units).magnitude)


def parse_quantity(value: object, unit: str) -> float:
    """Return `value` expressed in `unit` ("V", "A", "Ohm", "s", "Hz", "V/V" or "dB").

    A bare number is taken to be in `unit` already. The result is always finite. Raises
    ValueError with a message that says what was expected, e.g.
    "'50 uA' does not fit here: expected a value in V such as '50 uV'".
    """
    if unit != "dB" and unit not in _BASE_UNITS:
        raise ValueError(f"unknown unit {unit!r}")
    if isinstance(value, bool):
        raise ValueError(f"expected a value in {unit}, got {value!r}")
    if isinstance(value, int | float):
        return _finite(float(value), value, unit)
    if not isinstance(value, str) or not value.strip():
        raise ValueError(f"expected a value in {unit} such as {example_for(unit)!r}, got {value!r}")
    match = _QUANTITY.match(value)
    if not match:
        raise ValueError(f"cannot read {value!r} as a quantity: write it like {example_for(unit)!r}")
    number, unit_text = float(match.group(1)), match.group(2)
    if unit_text is None:
        return _finite(number, value, unit)
    if unit == "dB" or _DECIBEL_UNIT.match(unit_text):
        if unit != "dB":
            raise ValueError(f"{value!r} is in dB, but this entry takes {unit} (e.g. {example_for(unit)!r})")
        if not _DECIBEL_UNIT.match(unit_text):
            raise ValueError(f"{value!r} is not a level in dB: write it like '120 dB'")
        return _finite(number, value, unit)
    try:
        factor = _unit_factor(unit_text, unit)
    except ValueError as exc:
        raise ValueError(f"{value!r} does not fit here ({exc}): expected a value in {unit} "
                         f"such as {example_for(unit)!r}") from None
    # Round away the binary noise of the prefix conversion (5e-05, not 4.9999999999999996e-05).
    return _finite(float(f"{number * factor:.15g}"), value, unit)


def _finite(number: float, written: object, unit: str) -> float:
    if not math.isfinite(number):
        raise ValueError(f"{written!r} is not a finite value: expected a value in {unit} "
                         f"such as {example_for(unit)!r}")
    return number


def example_for(unit: str) -> str:
    return {"V": "50 uV", "A": "450 uA", "Ohm": "100 kOhm", "s": "20 ms", "Hz": "50 Hz",
            "V/V": "10 uV/V", "dB": "120 dB"}.get(unit, f"1 {unit}")


def format_quantity(value: float, unit: str) -> str:
    """A value as an engineer writes it: '160 uV', '20 mA', '12 V', '120 dB'."""
    if unit not in ("V", "A", "s", "Ohm") or value == 0:
        return f"{value:g} {unit}"
    prefixes: tuple[tuple[float, str], ...] = ((1e6, "M"), (1e3, "k"), (1.0, ""), (1e-3, "m"), (1e-6, "u"), (1e-9, "n"))
    if unit != "Ohm":
        prefixes = prefixes[2:]
    scale, prefix = next(((s, p) for s, p in prefixes if abs(value) >= s), prefixes[-1])
    return f"{value / scale:.6g} {prefix}{unit}"


def ratio_to_db(ratio: float) -> float:
    """Gain in dB of a magnitude ratio (20 log10): 1e6 V/V is 120 dB."""
    return 20.0 * math.log10(abs(ratio)) if ratio != 0 else math.inf


def rejection_db(slope: float) -> float:
    """Rejection in dB of an error slope (V/V): -20 log10 |slope|; 10 uV/V is 100 dB."""
    return -20.0 * math.log10(abs(slope)) if slope != 0 else math.inf

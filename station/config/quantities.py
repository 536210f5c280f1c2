"""Quantities with units in configuration files ("50 uV", "100 kOhm", "120 dB"), via pint.

Everything inside the station is plain floats in SI base units (V, A, Ohm, s, Hz) or dB;
units exist only at the edges (files, screens), and this module is that edge.
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
_DECIBEL = re.compile(r"^\s*([-+]?(?:\d+\.?\d*|\.\d+)(?:[eE][-+]?\d+)?)\s*dB\s*$")


@lru_cache(maxsize=1)
def _registry() -> pint.UnitRegistry:
    registry = pint.UnitRegistry(autoconvert_offset_to_baseunit=True)
    return registry


def parse_quantity(value: object, unit: str) -> float:
    """Return `value` expressed in `unit` ("V", "A", "Ohm", "s", "Hz", "V/V" or "dB").

    A bare number is taken to be in `unit` already. Raises ValueError with a message that
    says what was expected, e.g. "'50 uA' is not a voltage: expected a value in V such as '50 uV'".
    """
    if isinstance(value, bool):
        raise ValueError(f"expected a value in {unit}, got {value!r}")
    if isinstance(value, int | float):
        number = float(value)
        if not math.isfinite(number):
            raise ValueError(f"expected a finite value in {unit}, got {value!r}")
        return number
    if not isinstance(value, str) or not value.strip():
        raise ValueError(f"expected a value in {unit} such as {example_for(unit)!r}, got {value!r}")
    text = value.strip()
    if unit == "dB":
        match = _DECIBEL.match(text)
        if match:
            return float(match.group(1))
        try:
            return float(text)
        except ValueError:
            raise ValueError(f"{value!r} is not a level in dB: write it like '120 dB'") from None
    if unit not in _BASE_UNITS:
        raise ValueError(f"unknown unit {unit!r}")
    if _DECIBEL.match(text):
        raise ValueError(f"{value!r} is in dB, but this entry takes {unit} (e.g. {example_for(unit)!r})")
    registry = _registry()
    try:
        quantity = registry.Quantity(re.sub(r"(?i)ohms?\b|Ω", "ohm", text).replace("µ", "u"))
    except Exception:
        raise ValueError(f"cannot read {value!r} as a quantity: write it like {example_for(unit)!r}") from None
    target = registry.Quantity(1, _BASE_UNITS[unit])
    if isinstance(quantity, int | float) or quantity.dimensionless and unit != "V/V":
        magnitude = quantity if isinstance(quantity, int | float) else quantity.magnitude
        return float(magnitude)
    if quantity.dimensionality != target.dimensionality:
        raise ValueError(f"{value!r} does not fit here: expected a value in {unit} "
                         f"such as {example_for(unit)!r}")
    # Round away the binary noise of the prefix conversion (5e-05, not 4.9999999999999996e-05).
    return float(f"{float(quantity.to(target.units).magnitude):.15g}")


def example_for(unit: str) -> str:
    return {"V": "50 uV", "A": "450 uA", "Ohm": "100 kOhm", "s": "20 ms", "Hz": "50 Hz",
            "V/V": "10 uV/V", "dB": "120 dB"}.get(unit, f"1 {unit}")


def ratio_to_db(ratio: float) -> float:
    """Gain in dB of a magnitude ratio (20 log10): 1e6 V/V is 120 dB."""
    return 20.0 * math.log10(abs(ratio)) if ratio != 0 else math.inf


def rejection_db(slope: float) -> float:
    """Rejection in dB of an error slope (V/V): -20 log10 |slope|; 10 uV/V is 100 dB."""
    return -20.0 * math.log10(abs(slope)) if slope != 0 else math.inf

"""Readable units for screens and reports: results are in V, A, V/V or dB; people read uV, uA, uV/V."""

from __future__ import annotations

import math

# Precision op-amp figures are microvolts and microamps; one fixed scale per unit keeps
# columns comparable row to row.
DISPLAY: dict[str, tuple[float, str]] = {
    "V": (1e6, "uV"),
    "A": (1e6, "uA"),
    "V/V": (1e6, "uV/V"),
    "dB": (1.0, "dB"),
}


def display_unit(units: str) -> tuple[float, str]:
    """(factor, label): multiply a value in `units` by factor to show it in label."""
    return DISPLAY.get(units, (1.0, units))


def fmt(value: float | None, units: str, digits: int = 4, with_unit: bool = False) -> str:
    """A value shown in its readable unit, e.g. 5e-05 V -> '50 uV' (with_unit) or '50'."""
    if value is None or (isinstance(value, float) and math.isnan(value)):
        return ""
    factor, label = display_unit(units)
    if math.isinf(value):
        text = "inf" if value > 0 else "-inf"
    else:
        text = f"{value * factor:.{digits}g}"
    return f"{text} {label}" if with_unit else text


def fmt_share(value: float) -> str:
    return "" if value is None or math.isnan(value) else f"{100 * value:.2f} %"

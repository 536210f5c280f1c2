"""Range checks shared by the drivers: refuse a value before anything is sent."""

from __future__ import annotations

import math

from drivers.errors import RequestRefused


def require_within(role: str, what: str, value: float, low: float, high: float, unit: str,
                   reason: str) -> float:
    """Return `value` as a float, or raise RequestRefused if it is outside [low, high]."""
    number = float(value)
    if not math.isfinite(number) or not low <= number <= high:
        raise RequestRefused(role, what, f"{number:g} {unit}".strip(),
                             f"{low:g} {unit} to {high:g} {unit}".replace("  ", " "), reason)
    return number


def require_site(role: str, site: int, sites: int) -> int:
    if isinstance(site, bool) or not isinstance(site, int) or not 1 <= site <= sites:
        raise RequestRefused(role, "site", site, f"1 to {sites}", "the fixture's sites")
    return site

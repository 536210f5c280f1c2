"""Driver names, as written under `driver:` in a bench config, and how to build each driver.

A driver for a new kind of instrument is added here and in its own module; the bench
config then names it, and nothing else changes.
"""

from __future__ import annotations

from collections.abc import Callable
from dataclasses import dataclass

from drivers.dmm import LoopDmm
from drivers.force import ForceSource
from drivers.handler import ScpiHandler
from drivers.scpi_link import ScpiLink
from drivers.supply import DualRailSupply
from drivers.switch import FixtureSwitch


@dataclass(frozen=True)
class DriverSettings:
    """What the drivers need to know of the bench (plain SI floats)."""

    max_rail_v: float
    compliance_a: float
    line_hz: float
    sites: int


@dataclass(frozen=True)
class DriverEntry:
    role: str                                          # the role this driver can fill
    build: Callable[[ScpiLink, DriverSettings], object]


DRIVERS: dict[str, DriverEntry] = {
    "scpi-dual-supply": DriverEntry(
        "supply", lambda link, s: DualRailSupply(link, s.max_rail_v, s.compliance_a)),
    # The force input commands the DUT output, which can never leave the rails.
    "scpi-force-source": DriverEntry("force", lambda link, s: ForceSource(link, s.max_rail_v)),
    "scpi-dmm": DriverEntry("dmm", lambda link, s: LoopDmm(link, s.line_hz)),
    "scpi-fixture-switch": DriverEntry("switch", lambda link, s: FixtureSwitch(link, s.sites)),
    "scpi-handler": DriverEntry("handler", lambda link, s: ScpiHandler(link)),
}


class UnknownDriver(KeyError):
    def __str__(self) -> str:
        return str(self.args[0])


def known_drivers(role: str | None = None) -> list[str]:
    return sorted(name for name, entry in DRIVERS.items() if role is None or entry.role == role)


def driver_entry(name: str) -> DriverEntry:
    try:
        return DRIVERS[name]
    except KeyError:
        raise UnknownDriver(f"unknown driver {name!r}; known drivers: "
                            f"{', '.join(known_drivers())}") from None


def build_driver(name: str, link: ScpiLink, settings: DriverSettings) -> object:
    return driver_entry(name).build(link, settings)

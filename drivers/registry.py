"""Driver names, as written under `driver:` in a bench config, and how to build each driver.

One `Role` per instrument role, each with its own driver names and a builder that returns
that role's driver type, so the bench gets typed drivers without casts. A driver for a new
kind of instrument is added to its role's table here and in its own module; the bench config
then names it, and nothing else changes.
"""

from __future__ import annotations

from collections.abc import Callable, Mapping
from dataclasses import dataclass
from typing import Generic, TypeVar

from drivers.dio_handler import DioHandshakeHandler, HandshakeTiming
from drivers.dmm import LoopDmm
from drivers.force import ForceSource
from drivers.generator import FunctionGenerator
from drivers.handler import PartHandler, ScpiHandler
from drivers.scpi_link import ScpiLink
from drivers.supply import ApplySupply, DualRailSupply
from drivers.switch import FixtureSwitch

D = TypeVar("D", covariant=True)


@dataclass(frozen=True)
class DriverSettings:
    """What the drivers need to know of the bench (plain SI floats)."""

    max_rail_v: float
    compliance_a: float
    line_hz: float
    sites: int
    dmm_short_relays: int = 0   # DMMs whose input a fixture relay (401..) can short
    handshake: HandshakeTiming | None = None   # a handler wired through digital I/O lines
    bias_channels: tuple[int, ...] = ()   # switch channels that put Rb in series with an input
    switch_over_channels: tuple[int, ...] = ()  # per site: the relay to the difference amplifier


class UnknownDriver(KeyError):
    def __str__(self) -> str:
        return str(self.args[0])


@dataclass(frozen=True)
class Role(Generic[D]):
    """An instrument role and the drivers that can fill it, each building a `D`."""

    name: str
    drivers: Mapping[str, Callable[[ScpiLink, DriverSettings], D]]

    def build(self, driver: str, link: ScpiLink, settings: DriverSettings) -> D:
        try:
            builder = self.drivers[driver]
        except KeyError:
            raise UnknownDriver(f"{driver!r} is no {self.name} driver; {self.name} drivers: "
                                f"{', '.join(sorted(self.drivers))}") from None
        return builder(link, settings)


# Two command sets for the same role: channels picked with INSTrument:NSELect, or APPLy with
# a channel on every command. Both are a DualRailSupply to the station.
SUPPLY: Role[DualRailSupply] = Role("supply", {
    "scpi-dual-supply": lambda link, s: DualRailSupply(link, s.max_rail_v, s.compliance_a),
    "scpi-apply-supply": lambda link, s: ApplySupply(link, s.max_rail_v, s.compliance_a)})
# The force input commands the DUT output, which can never leave the rails.
FORCE: Role[ForceSource] = Role("force", {
    "scpi-force-source": lambda link, s: ForceSource(link, s.max_rail_v)})
DMM: Role[LoopDmm] = Role("dmm", {"scpi-dmm": lambda link, s: LoopDmm(link, s.line_hz)})
SWITCH: Role[FixtureSwitch] = Role("switch", {
    "scpi-fixture-switch": lambda link, s: FixtureSwitch(link, s.sites, s.dmm_short_relays, s.bias_channels,
                                                          s.switch_over_channels)})
def _dio_handler(link: ScpiLink, settings: DriverSettings) -> DioHandshakeHandler:
    if settings.handshake is None:
        raise UnknownDriver("dio-handshake needs the bench config's handshake section")
    return DioHandshakeHandler(link, settings.sites, settings.handshake)


# A handler that takes HANDler commands, or one wired to a digital I/O instrument.
HANDLER: Role[PartHandler] = Role("handler", {"scpi-handler": lambda link, s: ScpiHandler(link),
                                              "dio-handshake": _dio_handler})

# A sine on the difference amplifier's tied inputs: its peak never beyond the rails' limit.
GENERATOR: Role[FunctionGenerator] = Role("generator", {
    "scpi-function-generator": lambda link, s: FunctionGenerator(link, s.max_rail_v)})

ROLES: tuple[Role[object], ...] = (SUPPLY, FORCE, DMM, SWITCH, HANDLER, GENERATOR)


@dataclass(frozen=True)
class DriverEntry:
    """One driver name: the role it fills (what a bench config check needs to know)."""

    name: str
    role: str


DRIVERS: dict[str, DriverEntry] = {name: DriverEntry(name, role.name)
                                   for role in ROLES for name in role.drivers}


def known_drivers(role: str | None = None) -> list[str]:
    return sorted(name for name, entry in DRIVERS.items() if role is None or entry.role == role)


def driver_entry(name: str) -> DriverEntry:
    try:
        return DRIVERS[name]
    except KeyError:
        raise UnknownDriver(f"unknown driver {name!r}; known drivers: "
                            f"{', '.join(known_drivers())}") from None

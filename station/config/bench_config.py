"""The bench config: which instrument fills each role, the fixture constants, the safety limits.

`load_bench_config(path)` reads the YAML file, checks it, and returns a `BenchConfig` of plain
floats in SI units. Every problem is one line: ``file:line: key: what is wrong (how to fix)``.
"""

from __future__ import annotations

import math
from dataclasses import dataclass
from pathlib import Path
from typing import Annotated, Any

from pydantic import BaseModel, BeforeValidator, ConfigDict, Field
from pydantic_core import PydanticCustomError
from pyvisa.rname import InvalidResourceName, parse_resource_name

from drivers.dio_handler import HandshakeTiming
from drivers.registry import DRIVERS, known_drivers
from drivers.supply import INSTRUMENT_MAX_A as SUPPLY_MAX_A
from drivers.supply import INSTRUMENT_MAX_V as SUPPLY_MAX_V
from drivers.supply import INSTRUMENT_MIN_A as SUPPLY_MIN_A
from station.config.fields import plain_number, quantity
from station.config.files import (
    ConfigError,
    YamlDocument,
    load_yaml_file,
    parse_yaml_text,
    validate_model,
)
from station.config.quantities import format_quantity
from station.judge.measure import loop_gain

MAX_SITES = 4
# One set of safety limits: the rail supply's own range (drivers/supply.py), enforced here at
# load so a bench config can never promise more than the driver would send.
MAX_RAIL_LIMIT_V = SUPPLY_MAX_V
LINE_FREQUENCIES_HZ = (50.0, 60.0)
DEFAULT_TIMEOUT_S = 5.0


def _resource(value: Any) -> str:
    if not isinstance(value, str):
        raise PydanticCustomError("bad_resource", "{text}", {"text": (
            f"{value!r} is not a VISA resource string "
            "(write it like 'TCPIP0::192.0.2.10::5025::SOCKET' or 'GPIB0::5::INSTR')")})
    try:
        parse_resource_name(value)
    except InvalidResourceName as exc:
        raise PydanticCustomError("bad_resource", "{text}", {"text": (
            f"not a VISA resource string: {exc} "
            "(write it like 'TCPIP0::192.0.2.10::5025::SOCKET' or 'GPIB0::5::INSTR')")}) from None
    return value


Resource = Annotated[str, BeforeValidator(_resource)]
# Loop resistors beyond 1 GOhm are a typing slip, not a servo-loop fixture.
LoopOhms = Annotated[float, quantity("Ohm", gt=0, le=1e9, why="a servo-loop resistor")]
# The safety limits' own ranges are checked against the rail supply's in _check_limits, with
# the supply's range in the message; here only that they are finite quantities.
Volts = Annotated[float, quantity("V")]
Ohms = Annotated[float, quantity("Ohm")]   # range checked where it is used (e.g. _check_bias)
Amps = Annotated[float, quantity("A")]


class _Strict(BaseModel):
    model_config = ConfigDict(extra="forbid")


class InstrumentEntry(_Strict):
    resource: Resource
    driver: str
    timeout: Annotated[float, quantity("s", gt=0, le=600, why="a reply later than 10 minutes is no reply")] = \
        DEFAULT_TIMEOUT_S
    idn: str | None = None


class InstrumentsSection(_Strict):
    supply: InstrumentEntry
    force: InstrumentEntry
    dmm: list[InstrumentEntry] = Field(min_length=1)
    switch: InstrumentEntry
    handler: InstrumentEntry | None = None
    generator: InstrumentEntry | None = None   # a sine on the difference amplifier's inputs


class ResolutionSection(_Strict):
    """What the fixture can resolve (station/config/resolution.py)."""

    # RMS of one DMM reading at the loop node, at `nplc`
    dmm_noise: Annotated[float, quantity("V", ge=0, le=1.0, why="a DMM's reading noise")]
    nplc: Annotated[float, plain_number(gt=0, le=100, why="the DMM's integration range")] = 1.0
    # The fixture's own CMRR, where it has one.
    cmrr_limit: Annotated[float, quantity("dB", gt=0, le=300, why="a fixture's own CMRR")] | None = None


class BiasSection(_Strict):
    """Bias-current resistors: Rb per site (one value for every site, or a list) and, per
    site, the switch channel that opens the shunt across Rb on the + and on the - input."""

    rb: Ohms | list[Ohms]
    plus: list[int] = Field(min_length=1)
    minus: list[int] = Field(min_length=1)


class CharacterisedSection(_Strict):
    """A characterisation run with a reference part: the fixture's own common-mode slope per
    site (input-referred, signed) and how well that run knows it."""

    slope: list[Annotated[float, quantity("V/V", ge=-0.1, le=0.1, why="a fixture's common-mode slope")]] = \
        Field(min_length=1)
    residual: Annotated[float, quantity("dB", gt=0, le=300, why="what the characterisation leaves")]


class DiffAmpSection(_Strict):
    """The difference-amplifier fixture: four resistors around the part, inputs tied."""

    gain: Annotated[float, plain_number(gt=0, le=1000, why="a difference amplifier's gain")]
    tolerance: Annotated[float, quantity("V/V", gt=0, le=0.05, why="a resistor tolerance (e.g. 0.01 %)")]
    characterised: CharacterisedSection | None = None
    relays: list[int] | None = None   # kind both: per site, the channel that switches it over


class FixtureSection(_Strict):
    kind: str | list[str] = "servo_loop"
    rf: LoopOhms | None = None
    rs: LoopOhms | None = None
    diff_amp: DiffAmpSection | None = None
    sites: int = Field(strict=True)
    line_frequency: Annotated[float, quantity("Hz", gt=0, le=1000)]
    dmm_per_site: bool | None = Field(None, strict=True)
    resolution: ResolutionSection | None = None
    # Relays 401.. short the input of DMM 1.. to fixture ground (the self-test's zero check).
    dmm_short_relays: bool = Field(False, strict=True)
    bias: BiasSection | None = None


class SafetySection(_Strict):
    max_rail: Volts
    current_compliance: Amps


class HandshakeSection(_Strict):
    """Timing of a handler wired through digital I/O lines (driver dio-handshake)."""

    strobe_width: Annotated[float, quantity("s", gt=0, le=1, why="a strobe is milliseconds long")]
    settle: Annotated[float, quantity("s", ge=0, le=1, why="lines settle within milliseconds")]
    start_timeout: Annotated[float, quantity("s", gt=0, le=3600, why="an hour without a start is a stopped handler")]
    part_id_prefix: str = Field("P", pattern=r"^[A-Za-z0-9][A-Za-z0-9_.:/+-]{0,20}$")


class BenchFile(_Strict):
    station: str = ""
    visa_library: str = "@py"
    instruments: InstrumentsSection
    fixture: FixtureSection
    safety: SafetySection
    handshake: HandshakeSection | None = None


@dataclass(frozen=True)
class InstrumentConfig:
    role: str          # "supply", "force", "dmm1".., "switch", "handler"
    resource: str
    driver: str
    timeout_s: float
    idn: str | None = None


@dataclass(frozen=True)
class FixtureResolution:
    dmm_noise_v: float          # RMS node volts of one reading at `nplc`
    nplc: float
    cmrr_limit_db: float | None
    line: int | None            # line of fixture.resolution in the bench config

    def reading_noise_rti(self, loop_gain: float, nplc: float) -> float:
        """Input-referred RMS of one reading at `nplc` (white noise: 1/sqrt(integration time))."""
        return self.dmm_noise_v * (self.nplc / nplc) ** 0.5 / loop_gain


@dataclass(frozen=True)
class BiasFixture:
    """Per site (index 0 = site 1): Rb and the channels that put it in series with each input."""

    rb_ohm: tuple[float, ...]
    plus_channels: tuple[int, ...]
    minus_channels: tuple[int, ...]

    def channels(self, site: int, plus: bool, minus: bool) -> set[int]:
        """The channels to close at `site` for Rb in the + and/or - input."""
        return ({self.plus_channels[site - 1]} if plus else set()) | (
            {self.minus_channels[site - 1]} if minus else set())

    @property
    def all_channels(self) -> tuple[int, ...]:
        return self.plus_channels + self.minus_channels


@dataclass(frozen=True)
class DiffAmpFixture:
    """A difference amplifier of gain G around the part, both inputs tied to the force source.

    The part sees the common mode Vin x G / (1 + G) (Vin/2 at G = 1) and its offset error
    reaches the output with the noise gain 1 + G. The resistors' mismatch adds a common-mode
    slope of its own, input-referred at most 4 t / (1 + G) (the fixture's CMRR (1 + G) / (4 t),
    from memory); a characterisation run gives that slope per site, known to `residual_db`.
    """

    gain: float
    tolerance: float
    characterised: tuple[float, ...] | None = None   # per site (index 0 = site 1), V/V signed
    residual_db: float | None = None
    relays: tuple[int, ...] = ()                      # kind both: channel per site
    line: int | None = None                          # line of fixture.diff_amp

    @property
    def cm_share(self) -> float:
        """The part's common mode per volt at the tied inputs: G / (1 + G)."""
        return self.gain / (1.0 + self.gain)

    @property
    def noise_gain(self) -> float:
        return 1.0 + self.gain

    @property
    def worst_slope(self) -> float:
        """The largest input-referred common-mode slope the resistor mismatch can give: 4 t / (1 + G)."""
        return 4.0 * self.tolerance / (1.0 + self.gain)

    @property
    def resolution_slope(self) -> float:
        """What remains of the fixture's own term after the station has dealt with it: the
        characterisation's residual, or (uncharacterised) the worst case of the mismatch."""
        if self.characterised is not None and self.residual_db is not None:
            return 10.0 ** (-self.residual_db / 20.0)
        return self.worst_slope

    @property
    def resolution_db(self) -> float:
        return -20.0 * math.log10(self.resolution_slope)

    def fixture_slope(self, site: int) -> float:
        """The characterised slope to subtract at `site` (0 when uncharacterised)."""
        return self.characterised[site - 1] if self.characterised is not None else 0.0


FIXTURE_KINDS = ("servo_loop", "diff_amp", "both")
SWITCH_OVER_BANK = 7   # relays 70k switch site k from the servo loop to the difference amplifier


@dataclass(frozen=True)
class BenchConfig:
    station: str
    visa_library: str
    instruments: dict[str, InstrumentConfig]
    rf_ohm: float
    rs_ohm: float
    sites: int
    line_hz: float
    dmm_per_site: bool
    max_rail_v: float
    compliance_a: float
    source: Path | None = None
    resolution: FixtureResolution | None = None   # None: the bench config states none
    dmm_short_relays: bool = False
    handshake: HandshakeTiming | None = None
    bias: BiasFixture | None = None    # no bias resistors: the bias_current test cannot run
    fixture_kinds: tuple[str, ...] = ()  # per site: servo_loop, diff_amp or both (empty: servo_loop)
    diff_amp: DiffAmpFixture | None = None
    fixture_line: int | None = None      # line of fixture.kind, for errors

    @property
    def loop_gain(self) -> float:
        """Gain from the DUT offset to the measurement node: 1 + Rf/Rs in the servo loop, or
        the difference amplifier's noise gain 1 + G on a bench without a servo loop."""
        if not self.has_fixture("servo_loop") and self.diff_amp is not None:
            return self.diff_amp.noise_gain
        return loop_gain(self.rf_ohm, self.rs_ohm)

    def site_fixtures(self, site: int) -> set[str]:
        """The fixtures a site can measure in."""
        kind = self.fixture_kinds[site - 1] if self.fixture_kinds else "servo_loop"
        return {"servo_loop", "diff_amp"} if kind == "both" else {kind}

    def has_fixture(self, fixture: str) -> bool:
        """True when every site can measure in `fixture`."""
        return all(fixture in self.site_fixtures(site) for site in range(1, self.sites + 1))

    @property
    def switch_over_channels(self) -> tuple[int, ...]:
        return self.diff_amp.relays if self.diff_amp is not None else ()

    @property
    def dmm_roles(self) -> list[str]:
        return [role for role in self.instruments if role.startswith("dmm")]

    @property
    def has_handler(self) -> bool:
        return "handler" in self.instruments

    @property
    def has_generator(self) -> bool:
        return "generator" in self.instruments


def load_bench_config(path: str | Path) -> BenchConfig:
    doc = load_yaml_file(path)
    return _build(doc, Path(path))


def parse_bench_config(text: str, file: str = "<text>") -> BenchConfig:
    return _build(parse_yaml_text(text, file), None)


def _build(doc: YamlDocument, source: Path | None) -> BenchConfig:
    model = validate_model(doc, BenchFile)
    _check_drivers(doc, model.instruments)
    fixture, safety = model.fixture, model.safety
    _check_limits(doc, fixture, safety)
    if fixture.line_frequency not in LINE_FREQUENCIES_HZ:
        raise doc.error(["fixture", "line_frequency"],
                        f"{fixture.line_frequency:g} Hz is not a power-line frequency",
                        "write 50 Hz or 60 Hz")
    dmm_per_site = _check_dmm_count(doc, model)
    instruments: dict[str, InstrumentConfig] = {}

    def add(role: str, entry: InstrumentEntry) -> None:
        instruments[role] = InstrumentConfig(role, entry.resource, entry.driver,
                                             entry.timeout, entry.idn)

    add("supply", model.instruments.supply)
    add("force", model.instruments.force)
    for number, entry in enumerate(model.instruments.dmm, start=1):
        add(f"dmm{number}", entry)
    add("switch", model.instruments.switch)
    if model.instruments.handler is not None:
        add("handler", model.instruments.handler)
    if model.instruments.generator is not None:
        add("generator", model.instruments.generator)
    bias = _check_bias(doc, fixture)
    kinds, diff_amp = _check_fixture_kinds(doc, fixture)
    station = model.station or (source.stem if source is not None else "bench")
    res = fixture.resolution
    resolution = (FixtureResolution(res.dmm_noise, res.nplc, res.cmrr_limit, doc.line_of(["fixture", "resolution"]))
                  if res is not None else None)
    return BenchConfig(station=station, visa_library=model.visa_library, instruments=instruments,
                       rf_ohm=fixture.rf or 0.0, rs_ohm=fixture.rs or 1.0, sites=fixture.sites,
                       line_hz=fixture.line_frequency, dmm_per_site=dmm_per_site,
                       max_rail_v=safety.max_rail, compliance_a=safety.current_compliance,
                       source=source, resolution=resolution, dmm_short_relays=fixture.dmm_short_relays,
                       handshake=_handshake(doc, model), bias=bias, fixture_kinds=kinds,
                       diff_amp=diff_amp, fixture_line=doc.line_of(["fixture", "kind"]))


_KIND_HINT = "write servo_loop, diff_amp or both (one for every site, or a list, one per site)"


def _check_fixture_kinds(doc: YamlDocument, fixture: FixtureSection) -> tuple[tuple[str, ...], DiffAmpFixture | None]:
    """The fixture kind of each site, and the difference amplifier where one is named."""
    sites = fixture.sites
    listed = isinstance(fixture.kind, list)
    kinds = list(fixture.kind) if isinstance(fixture.kind, list) else [fixture.kind] * sites
    if len(kinds) != sites:
        raise doc.error(["fixture", "kind"], f"{len(kinds)} entries for a {sites}-site fixture",
                        f"give one per site ({sites}), or one for all")
    for i, kind in enumerate(kinds):
        if kind not in FIXTURE_KINDS:
            raise doc.error(["fixture", "kind", *([i] if listed else [])], f"unknown fixture kind {kind!r}", _KIND_HINT)
    servo = any(k in ("servo_loop", "both") for k in kinds)
    diff = any(k in ("diff_amp", "both") for k in kinds)
    if servo and (fixture.rf is None or fixture.rs is None):
        raise doc.error(["fixture", "rf" if fixture.rf is None else "rs"], "a servo-loop fixture needs rf and rs",
                        "give the loop resistors, e.g. rf: 100 kOhm, rs: 100 Ohm")
    section = fixture.diff_amp
    if not diff:
        if section is not None:
            raise doc.error(["fixture", "diff_amp"], "no site has a difference amplifier (fixture.kind)",
                            "set fixture.kind to diff_amp or both, or remove fixture.diff_amp")
        return tuple(kinds), None
    if section is None:
        raise doc.error(["fixture", "kind"], "a difference-amplifier fixture needs fixture.diff_amp",
                        "add diff_amp: {gain: 1, tolerance: 0.01 %}")
    relays: tuple[int, ...] = ()
    if "both" in kinds:
        if section.relays is None or len(section.relays) != sites:
            raise doc.error(["fixture", "diff_amp", *(["relays"] if section.relays is not None else [])],
                            "a site switched between the two fixtures needs its switch-over relay",
                            f"add relays: one channel 7xx per site ({', '.join(str(700 + k) for k in range(1, sites + 1))})")
        for i, channel in enumerate(section.relays):
            if channel // 100 != SWITCH_OVER_BANK or not 1 <= channel % 100 <= 99 or channel in section.relays[:i]:
                raise doc.error(["fixture", "diff_amp", "relays", i],
                                f"channel {channel} is not a free switch-over relay (7xx, once each; "
                                "1xx-6xx are power, scanner, load, DMM shorts and bias shunts)",
                                "see docs/fixtures.md: 701-704 on the demo fixture")
        relays = tuple(section.relays)
    elif section.relays is not None:
        raise doc.error(["fixture", "diff_amp", "relays"], "relays switch a site of kind both; no site is",
                        "remove relays, or set fixture.kind: both")
    characterised, residual = None, None
    if section.characterised is not None:
        if len(section.characterised.slope) != sites:
            raise doc.error(["fixture", "diff_amp", "characterised", "slope"],
                            f"{len(section.characterised.slope)} entries for a {sites}-site fixture",
                            f"give the characterised slope of each site ({sites})")
        characterised, residual = tuple(section.characterised.slope), section.characterised.residual
    amp = DiffAmpFixture(section.gain, section.tolerance, characterised, residual, relays,
                         doc.line_of(["fixture", "diff_amp"]))
    return tuple(kinds), amp


def _handshake(doc: YamlDocument, model: BenchFile) -> HandshakeTiming | None:
    handler = model.instruments.handler
    wired = handler is not None and handler.driver == "dio-handshake"
    section = model.handshake
    if wired and section is None:
        raise doc.error(["instruments", "handler", "driver"],
                        "dio-handshake needs the handshake timing",
                        "add a handshake section: strobe_width, settle, start_timeout "
                        "(e.g. 2 ms, 1 ms, 30 s)")
    if section is None:
        return None
    return HandshakeTiming(section.strobe_width, section.settle, section.start_timeout,
                           section.part_id_prefix)


RB_RANGE_OHM = (1e3, 10e9)   # below, no bias current shows; above, the fixture's leakage rules
SWITCH_CHANNELS = (100, 9999)


def _check_bias(doc: YamlDocument, fixture: FixtureSection) -> BiasFixture | None:
    section = fixture.bias
    if section is None:
        return None
    sites = fixture.sites
    rb = section.rb if isinstance(section.rb, list) else [section.rb] * sites
    for key, values in (("rb", rb), ("plus", section.plus), ("minus", section.minus)):
        if len(values) != sites:
            raise doc.error(["fixture", "bias", key], f"{len(values)} entries for a {sites}-site fixture",
                            f"give one per site ({sites})")
    for i, value in enumerate(rb):
        if not RB_RANGE_OHM[0] <= value <= RB_RANGE_OHM[1]:
            raise doc.error(["fixture", "bias", "rb"] + ([i] if isinstance(section.rb, list) else []),
                            f"{format_quantity(value, 'Ohm')} is outside {format_quantity(RB_RANGE_OHM[0], 'Ohm')}"
                            f" to {format_quantity(RB_RANGE_OHM[1], 'Ohm')}", "e.g. rb: 100 MOhm")
    channels = [*section.plus, *section.minus]
    for i, channel in enumerate(channels):
        key = "plus" if i < sites else "minus"
        if not SWITCH_CHANNELS[0] <= channel <= SWITCH_CHANNELS[1] or channel // 100 in (1, 2, 3, 4, SWITCH_OVER_BANK):
            raise doc.error(["fixture", "bias", key, i % sites],
                            f"channel {channel} is not a bias relay (101-499 are power, scanner, load and DMM shorts, "
                            "7xx the fixture switch-over)",
                            "see docs/bench-commands.md: 501-504 and 601-604 on the demo fixture")
        if channel in channels[:i]:     # named at its second use
            raise doc.error(["fixture", "bias", key, i % sites], f"channel {channel} is listed twice",
                            "each input of each site has its own relay")
    return BiasFixture(tuple(rb), tuple(section.plus), tuple(section.minus))


def _check_limits(doc: YamlDocument, fixture: FixtureSection, safety: SafetySection) -> None:
    if not 1 <= fixture.sites <= MAX_SITES:
        raise doc.error(["fixture", "sites"], f"{fixture.sites} sites: the fixture has 1 to {MAX_SITES}",
                        f"write a number from 1 to {MAX_SITES}")
    if not 0 < safety.max_rail <= MAX_RAIL_LIMIT_V:
        raise doc.error(["safety", "max_rail"],
                        f"{safety.max_rail:g} V is outside (0, {MAX_RAIL_LIMIT_V:g} V], the rail "
                        "supply's range",
                        "give the largest rail magnitude the parts may see, e.g. '12 V'")
    if not SUPPLY_MIN_A <= safety.current_compliance <= SUPPLY_MAX_A:
        raise doc.error(["safety", "current_compliance"],
                        f"{format_quantity(safety.current_compliance, 'A')} is outside the rail supply's "
                        f"compliance range {format_quantity(SUPPLY_MIN_A, 'A')} to "
                        f"{format_quantity(SUPPLY_MAX_A, 'A')}",
                        "give the supply's current limit, e.g. '20 mA'")


def _check_drivers(doc: YamlDocument, section: InstrumentsSection) -> None:
    entries: list[tuple[list[str | int], str, InstrumentEntry]] = [
        (["instruments", "supply"], "supply", section.supply),
        (["instruments", "force"], "force", section.force),
        *((list[str | int](["instruments", "dmm", i]), "dmm", e) for i, e in enumerate(section.dmm)),
        (["instruments", "switch"], "switch", section.switch),
    ]
    if section.handler is not None:
        entries.append((["instruments", "handler"], "handler", section.handler))
    if section.generator is not None:
        entries.append((["instruments", "generator"], "generator", section.generator))
    for path, role, entry in entries:
        known = DRIVERS.get(entry.driver)
        if known is None or known.role != role:
            what = "unknown driver" if known is None else f"driver for a {known.role}, not a {role}"
            raise doc.error([*path, "driver"], f"{entry.driver!r}: {what}",
                            f"use {' or '.join(known_drivers(role))}")


def _check_dmm_count(doc: YamlDocument, model: BenchFile) -> bool:
    count, sites = len(model.instruments.dmm), model.fixture.sites
    wanted = model.fixture.dmm_per_site
    if wanted is None:
        if count not in (1, sites):
            raise doc.error(["instruments", "dmm"],
                            f"{count} DMMs fit neither one per site ({sites}) nor one with the scanner",
                            f"list {sites} DMMs, or one")
        return count == sites
    if wanted and count != sites:
        raise doc.error(["instruments", "dmm"],
                        f"{count} DMMs listed, but dmm_per_site is true and the fixture has {sites} sites",
                        f"list {sites} DMMs, or set dmm_per_site: false and list one")
    if not wanted and count != 1:
        raise doc.error(["instruments", "dmm"],
                        f"{count} DMMs listed, but dmm_per_site is false (one DMM with the scanner)",
                        "list one DMM, or set dmm_per_site: true and list one per site")
    return wanted


__all__ = ["BenchConfig", "BiasFixture", "DiffAmpFixture", "ConfigError", "InstrumentConfig", "load_bench_config",
           "parse_bench_config"]

"""Opening the bench a config describes, and bringing it to a safe state on the way out.

`open_bench(config)` opens every link, checks each instrument is the one the config expects,
puts everything in a known state (reset, outputs off, relays open) and returns a `Bench`
holding one typed driver per role. `Bench.safe_state()` is the one way out: force source to
zero and off, rails down and off, relays open, each step tried whatever happened before.
"""

from __future__ import annotations

from collections.abc import Callable
from dataclasses import dataclass
from typing import TypeVar

import click

from drivers.dmm import LoopDmm
from drivers.errors import InstrumentError, InstrumentOpenError
from drivers.force import ForceSource
from drivers.generator import FunctionGenerator
from drivers.handler import ManualHandler, PartHandler
from drivers.registry import DMM, FORCE, GENERATOR, HANDLER, SUPPLY, SWITCH, DriverSettings, Role
from drivers.retry import NO_RETRY
from drivers.scpi_link import ScpiLink, check_errors_together
from drivers.supply import DualRailSupply
from drivers.switch import FixtureSwitch
from station.config.bench_config import BenchConfig
from station.lot.stop_signals import LotInterrupted

D = TypeVar("D")

# Defaults until the sequence configures the DMMs: 1 NPLC, 10 V range, autozero on.
_DEFAULT_NPLC, _DEFAULT_RANGE_V = 1.0, 10.0


@dataclass
class Bench:
    config: BenchConfig
    supply: DualRailSupply
    force: ForceSource
    dmms: list[LoopDmm]
    switch: FixtureSwitch
    handler: PartHandler
    generator: FunctionGenerator | None = None   # where the bench config names one
    unverified: list[str] | None = None   # set by safe_state(): what could not be confirmed

    def all_links(self) -> dict[str, ScpiLink]:
        """role -> link of every SCPI instrument (a manual handler has none)."""
        links = {"supply": self.supply.link, "force": self.force.link}
        links.update({dmm.link.role: dmm.link for dmm in self.dmms})
        links["switch"] = self.switch.link
        if self.generator is not None:
            links["generator"] = self.generator.link
        handler_link = getattr(self.handler, "link", None)
        if isinstance(handler_link, ScpiLink):
            links["handler"] = handler_link
        return links

    def identities(self) -> dict[str, str]:
        """role -> *IDN? reply; the manual handler is named as such."""
        found = {role: link.identify() for role, link in self.all_links().items()}
        if "handler" not in found:
            found["handler"] = "manual: the operator seats and sorts the parts"
        return found

    def safe_state(self) -> list[str]:
        """Generator off, force to 0 V and off, then both rails down and off, then every relay open.

        Each step is tried even if an earlier one failed, with short timeouts and no resends
        beyond one reconnect, so an instrument that does not answer is reported within
        seconds and the others are still made safe. Each step ends with a read-back on a
        resynchronised link. Returns one line per step; `unverified` lists, in words an
        operator acts on, what could not be confirmed (empty: the bench is safe).
        """
        log: list[str] = []
        self.unverified = []

        def open_relays() -> None:
            self.switch.open_all()
            self.switch.confirm_open()

        steps: list[tuple[ScpiLink, str, Callable[[], None], str]] = [] if self.generator is None else [
            (self.generator.link, "output off", self.generator.zero_and_off,
             "generator output may still be live: switch it off at the instrument")]
        steps += [
            (self.force.link, "level 0 V and output off", self.force.zero_and_off,
             "force output may still be live: switch it off at the instrument"),
            (self.supply.link, "rails ramped to 0 V and outputs off", self.supply.ramp_down_and_off,
             "supply outputs may still be live: switch off at the instrument"),
            (self.switch.link, "all relays open", open_relays,
             "fixture relays may still be closed: switch the supply off at the instrument "
             "before touching a site"),
        ]
        for link, action, step, warning in steps:
            outcome = _attempt(link, step)
            if outcome.startswith("NOT VERIFIED"):
                self.unverified.append(f"{link.role}: {warning}")
            log.append(f"{link.role}: {action}: {outcome}")
        return log

    @property
    def is_safe(self) -> bool:
        """True once a safe state ran and every step was confirmed by read-back."""
        return self.unverified == []

    def close(self) -> None:
        for link in self.all_links().values():
            link.close()

    def __enter__(self) -> Bench:
        return self

    def __exit__(self, *exc_info: object) -> None:
        try:
            self.safe_state()
        finally:
            self.close()


# A safe-state transaction waits at most this long for a reply: an instrument that is silent
# for longer is reported, not waited for (the old default, 5 s x 3 tries x every command,
# let one slow supply hold the way out for minutes).
SAFE_STATE_TIMEOUT_S = 2.0


def _attempt(link: ScpiLink, step: Callable[[], None]) -> str:
    """Run one safe-state step; after an instrument failure reconnect and run it once more.

    "ok", "ok after ..." or "NOT VERIFIED: why"."""
    saved = link.timeout_s, link.retry
    link.timeout_s, link.retry = min(saved[0], SAFE_STATE_TIMEOUT_S), NO_RETRY
    try:
        try:
            step()
        except InstrumentError as first:
            try:
                link.reconnect()
                step()
                return f"ok after reconnecting ({first})"
            except Exception as again:  # the way out must never stop half-way
                return f"NOT VERIFIED: {again}"
        except Exception as exc:
            return f"NOT VERIFIED: {exc}"
        return "ok"
    finally:
        link.timeout_s, link.retry = saved


def open_bench(config: BenchConfig, *, ask: Callable[[str], str] | None = None,
               tell: Callable[[str], None] | None = None,
               seated: Callable[[int, str | None], None] | None = None) -> Bench:
    """Open, identify and reset every instrument of `config`; raise InstrumentOpenError if one fails."""
    settings = DriverSettings(max_rail_v=config.max_rail_v, compliance_a=config.compliance_a,
                              line_hz=config.line_hz, sites=config.sites,
                              dmm_short_relays=len(config.dmm_roles) if config.dmm_short_relays else 0,
                              handshake=config.handshake,
                              bias_channels=config.bias.all_channels if config.bias else (),
                              switch_over_channels=config.switch_over_channels)
    links: dict[str, ScpiLink] = {}
    try:
        for role, instrument in config.instruments.items():
            link = ScpiLink(role, instrument.resource, config.visa_library, instrument.timeout_s)
            link.open()
            links[role] = link
            _check_identity(link, instrument.idn)
        def build(role: Role[D], name: str) -> D:
            return role.build(config.instruments[name].driver, links[name], settings)

        handler = build(HANDLER, "handler") if "handler" in links else ManualHandler(
            config.sites, ask or ask_operator, tell or click.echo, seated)
        bench = Bench(config=config,
                      supply=build(SUPPLY, "supply"),
                      force=build(FORCE, "force"),
                      dmms=[build(DMM, name) for name in config.dmm_roles],
                      switch=build(SWITCH, "switch"),
                      handler=handler,
                      generator=build(GENERATOR, "generator") if "generator" in links else None)
    except BaseException:
        for link in links.values():
            link.close()
        raise
    try:
        _known_state_tried_twice(bench)
    except BaseException:
        bench.safe_state()
        bench.close()
        raise
    return bench


def _known_state_tried_twice(bench: Bench) -> None:
    # An error left in a queue means a setting may not have taken: the whole known state is
    # sent again once (every command of it is harmless to repeat) before giving up.
    try:
        _known_state(bench)
    except InstrumentError:
        _known_state(bench)


def _check_identity(link: ScpiLink, expected: str | None) -> None:
    try:
        reply = link.identify()
    except InstrumentError as exc:
        raise InstrumentOpenError(link.role, link.resource, "*IDN?",
                                  f"got no identification: {exc.detail}") from exc
    if expected is not None and expected not in reply:
        raise InstrumentOpenError(link.role, link.resource, "*IDN?",
                                  f"answered {reply!r}, which does not contain {expected!r} "
                                  "(wrong instrument at this address, or fix idn in the bench config)")


def _known_state(bench: Bench) -> None:
    for link in bench.all_links().values():
        link.reset()
    if bench.generator is not None:
        bench.generator.configure()
    bench.force.configure()
    bench.supply.outputs(False)
    bench.supply.set_rails(0.0, 0.0)
    bench.supply.configure()
    bench.switch.open_all()
    for dmm in bench.dmms:
        dmm.configure(_DEFAULT_NPLC, _DEFAULT_RANGE_V, autozero=True)
    check_errors_together(list(bench.all_links().values()))


def ask_operator(text: str) -> str:
    """One line typed by the operator at the terminal (manual socket)."""
    try:
        return str(click.prompt(text, default="", show_default=False))
    except click.Abort:
        # The operator's input closed (end of file, or Ctrl-D/Ctrl-C at the prompt): stop the lot.
        raise LotInterrupted("operator input ended (no more part ids)") from None

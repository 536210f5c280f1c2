"""The fixture relays: site power (10x), scanner to the first DMM (20x), output load (30x),
and where the fixture has them, a short across DMM k's input (40k) and the bias-resistor
relays the bench config names (closing one opens the shunt across Rb), and on a fixture of both
kinds the switch-over of each site to the difference amplifier (7xx, named in the bench config)."""

from __future__ import annotations

from collections.abc import Iterable

from drivers.errors import InstrumentBadReply, InstrumentError, RequestRefused
from drivers.range_checks import require_site
from drivers.scpi_link import ScpiLink

MAX_SITES = 4
POWER, SCANNER, LOAD, SHORT = 100, 200, 300, 400


def channel_list(channels: Iterable[int]) -> str:
    return "(@" + ",".join(str(c) for c in sorted(channels)) + ")"


class FixtureSwitch:
    def __init__(self, link: ScpiLink, sites: int, short_relays: int = 0,
                 bias_channels: Iterable[int] = (), switch_over_channels: Iterable[int] = ()) -> None:
        if not 1 <= sites <= MAX_SITES:
            raise RequestRefused(link.role, "sites", sites, f"1 to {MAX_SITES}")
        if not 0 <= short_relays <= MAX_SITES:
            raise RequestRefused(link.role, "DMM short relays", short_relays, f"0 to {MAX_SITES}")
        self.link = link
        self.sites = sites
        self.short_relays = short_relays
        self.bias_channels = tuple(sorted(bias_channels))
        self.switch_over_channels = tuple(switch_over_channels)   # index 0 = site 1

    @property
    def role(self) -> str:
        return self.link.role

    def _site(self, site: int) -> int:
        return require_site(self.role, site, self.sites)

    def power_sites(self, sites: set[int]) -> None:
        """Close the power relays of `sites` and open the others, in one message."""
        wanted = {self._site(s) for s in sites}
        others = set(range(1, self.sites + 1)) - wanted
        parts = []
        # Open first, so no site is ever powered that should not be; kept sites never blink.
        if others:
            parts.append(f"ROUT:OPEN {channel_list(POWER + s for s in others)}")
        if wanted:
            parts.append(f"ROUT:CLOS {channel_list(POWER + s for s in wanted)}")
        self.link.write_and_wait(";:".join(parts))

    def route_to_dmm(self, site: int | None) -> None:
        """Connect one site's loop node to the first DMM (None: disconnect the scanner)."""
        every = channel_list(SCANNER + s for s in range(1, self.sites + 1))
        if site is None:
            self.link.write_and_wait(f"ROUT:OPEN {every}")
            return
        # Only one scanner relay may be closed: open them all before closing the new one.
        self.link.write_and_wait(f"ROUT:OPEN {every};:ROUT:CLOS (@{SCANNER + self._site(site)})")

    def set_load(self, site: int, on: bool) -> None:
        verb = "CLOS" if on else "OPEN"
        self.link.write_and_wait(f"ROUT:{verb} (@{LOAD + self._site(site)})")

    def short_dmm_input(self, dmm: int, on: bool) -> None:
        """Short (or un-short) the input of DMM `dmm` (1-based) with its relay 40k."""
        if not 1 <= dmm <= self.short_relays:
            raise RequestRefused(self.role, "DMM short relay", dmm,
                                 f"1 to {self.short_relays}" if self.short_relays else
                                 "none: the fixture has no DMM short relays (fixture.dmm_short_relays)")
        self.link.write_and_wait(f"ROUT:{'CLOS' if on else 'OPEN'} (@{SHORT + dmm})")

    def channels(self) -> list[int]:
        """Every relay of the fixture, bank by bank."""
        return ([bank + s for bank in (POWER, SCANNER, LOAD) for s in range(1, self.sites + 1)]
                + [SHORT + k for k in range(1, self.short_relays + 1)] + list(self.bias_channels)
                + sorted(self.switch_over_channels))

    def set_bias(self, closed: set[int]) -> None:
        """Close exactly `closed` of the bias relays (Rb in series), open the others, in one message."""
        unknown = closed - set(self.bias_channels)
        if unknown:
            raise RequestRefused(self.role, "bias channel", min(unknown), f"one of {list(self.bias_channels)}")
        self._close_exactly(closed, set(self.bias_channels))

    def switch_to_diff_amp(self, sites: set[int]) -> None:
        """Switch `sites` to the difference amplifier and every other site to the servo loop,
        in one message (a fixture of kind both; channel per site from the bench config)."""
        if not self.switch_over_channels:
            raise RequestRefused(self.role, "switch-over", sorted(sites),
                                 "none: the fixture has no switch-over relays (fixture.diff_amp.relays)")
        wanted = {self.switch_over_channels[self._site(s) - 1] for s in sites}
        self._close_exactly(wanted, set(self.switch_over_channels))

    def _close_exactly(self, closed: set[int], group: set[int]) -> None:
        """Close `closed` and open the rest of the relay group `group`, in one message."""
        others = group - closed
        parts = []
        if others:
            parts.append(f"ROUT:OPEN {channel_list(others)}")
        if closed:
            parts.append(f"ROUT:CLOS {channel_list(closed)}")
        if parts:
            self.link.write_and_wait(";:".join(parts))

    def open_all(self) -> None:
        self.link.write_and_wait("ROUT:OPEN:ALL")

    def confirm_open(self) -> None:
        """Raise if any relay still reads closed (used after open_all on the way out)."""
        still = self.closed()
        if still:
            raise InstrumentError(self.role, self.link.resource, "ROUT:CLOS?",
                                     f"relays {sorted(still)} still closed after ROUT:OPEN:ALL")

    def closed(self) -> set[int]:
        """Channel numbers (101.., 201.., 301..) of the fixture's relays that are closed."""
        channels = self.channels()
        command = f"ROUT:CLOS? {channel_list(channels)}"
        states = self.link.query_bools(command)
        if len(states) != len(channels):
            raise InstrumentBadReply(self.role, self.link.resource, command,
                                     f"returned {len(states)} states for {len(channels)} channels")
        return {c for c, state in zip(channels, states, strict=True) if state}

    def powered_sites(self) -> set[int]:
        return {c - POWER for c in self.closed() if POWER < c < SCANNER}

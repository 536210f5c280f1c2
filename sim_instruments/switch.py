"""Simulated fixture relay matrix: site power (10k), scanner (20k), output load (30k), a short
across the input of DMM k (40k, for the bench self-test's zero check), and the bias resistors
of the + (50k) and - (60k) inputs (closing the channel opens the shunt across Rb, so Rb is in
series with the input), and the switch-over of a site to the difference amplifier (70k)."""

from __future__ import annotations

from sim_instruments.instrument import Instrument
from sim_instruments.model import BenchModel
from sim_instruments.scpi_errors import ScpiError
from sim_instruments.scpi_params import Arguments, channel_list
from sim_instruments.scpi_tree import CommandTree

# 1xx power, 2xx scanner, 3xx load, 4xx short DMM k's input, 5xx / 6xx Rb in + / - input,
# 7xx switch site k from the servo loop to the difference amplifier (a fixture of kind both)
BANKS = (1, 2, 3, 4, 5, 6, 7)
SCANNER_BANK = 2


class FixtureSwitch(Instrument):
    model_name = "ASX-312"

    def __init__(self, model: BenchModel, **kwargs) -> None:
        self.model = model
        super().__init__(**kwargs)

    def reset(self) -> None:
        with self.model.lock:
            self.model.set_relays(set(), self.clock.now())

    def build(self, tree: CommandTree) -> None:
        channels = Arguments([channel_list])
        tree.add("ROUTe:CLOSe", self._close, self._query_closed, args=channels, query_args=channels)
        tree.add("ROUTe:OPEN", self._open, self._query_open, args=channels, query_args=channels)
        tree.add("ROUTe:OPEN:ALL", self._open_all)

    def _check(self, channels: tuple[int, ...]) -> None:
        sites = self.model.fixture.sites
        for channel in channels:
            bank, site = divmod(channel, 100)
            if bank not in BANKS or not 1 <= site <= (4 if bank == 4 else sites):
                raise ScpiError(-222, f"no relay {channel} on a {sites}-site fixture")

    def _close(self, channels: tuple[int, ...]) -> None:
        self._check(channels)
        stuck = self.faults.stuck_relay
        with self.model.lock:
            closed = self.model.relays | {c for c in channels if c != stuck}
            if sum(1 for c in closed if c // 100 == SCANNER_BANK) > 1:
                raise ScpiError(-221, "only one scanner relay may be closed")
            self.model.set_relays(closed, self.clock.now())

    def _open(self, channels: tuple[int, ...]) -> None:
        self._check(channels)
        with self.model.lock:
            self.model.set_relays(self.model.relays - set(channels), self.clock.now())

    def _open_all(self) -> None:
        with self.model.lock:
            self.model.set_relays(set(), self.clock.now())

    def _query_closed(self, channels: tuple[int, ...]) -> str:
        self._check(channels)
        return ",".join(self.dialect.flag(c in self.model.relays) for c in channels)

    def _query_open(self, channels: tuple[int, ...]) -> str:
        self._check(channels)
        return ",".join("0" if c in self.model.relays else "1" for c in channels)

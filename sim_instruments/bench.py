"""SimBench: the whole simulated bench (model, instruments, servers) behind one object.

Invented demo bench for the fictional PX-401; see model.py for the physics.
"""

from __future__ import annotations

import csv
import dataclasses
import threading
from dataclasses import dataclass
from pathlib import Path

from sim_instruments.clock import ModelClock
from sim_instruments.dmm import Dmm
from sim_instruments.faults import FaultSettings
from sim_instruments.force import ForceSource
from sim_instruments.handler import Handler
from sim_instruments.instrument import Instrument
from sim_instruments.model import (
    BIAS_MINUS_BANK,
    BIAS_PLUS_BANK,
    DEFAULT_COMPLIANCE_A,
    DEFAULT_RB_OHM,
    BenchModel,
    FixtureSpec,
)
from sim_instruments.population import TRUTH_COLUMNS, PartTruth, make_population, truth_row
from sim_instruments.server import CommandRecord, InstrumentServer
from sim_instruments.supply import Supply
from sim_instruments.switch import FixtureSwitch

DRIVERS = {"supply": "scpi-dual-supply", "force": "scpi-force-source", "dmm": "scpi-dmm",
           "switch": "scpi-fixture-switch", "handler": "scpi-handler"}

__all__ = ["SimBench", "SimSettings", "CommandRecord", "FaultSettings", "PartTruth"]


@dataclass
class SimSettings:
    seed: int = 1
    sites: int = 4            # 1..4
    parts: int = 32           # parts in the simulated lot
    rf_ohm: float = 100e3
    rs_ohm: float = 100.0
    rb_ohm: tuple[float, ...] = (DEFAULT_RB_OHM,)  # bias resistor per site (the last repeats)
    line_hz: float = 50.0
    speed: float = 1.0        # model time per wall time; waits are divided by it
    dmm_per_site: bool = True  # False: one dmm1 reading through scanner relays 201-204
    host: str = "127.0.0.1"   # loopback unless explicitly changed
    base_port: int = 0        # 0 = ephemeral ports
    handler_index_s: float = 0.2  # model seconds per HANDler:NEXT? index
    defects: bool = True      # include gross defects in the population
    log_commands: bool = False
    # For the overhead benchmark: no settling transients and no integration wait (readings
    # are instant and exact but for noise). Implemented in the model and the DMM.
    ideal: bool = False
    # For resuming a lot: the handler starts after the first `skip_parts` parts of the lot,
    # as a real handler would after those were sorted in an earlier session.
    skip_parts: int = 0


class SimBench:
    """Start with `start()` (or `with SimBench(settings) as bench:`), stop with `stop()`."""

    def __init__(self, settings: SimSettings) -> None:
        if not 1 <= settings.sites <= 4:
            raise ValueError("sites must be 1 to 4")
        if settings.line_hz not in (50.0, 60.0):
            raise ValueError("line_hz must be 50 or 60")
        self.settings = settings
        self.clock = ModelClock(settings.speed)
        self.parts = make_population(settings.seed, settings.parts, settings.defects)
        rb = tuple(settings.rb_ohm) or (DEFAULT_RB_OHM,)
        self.model = BenchModel(FixtureSpec(settings.sites, settings.rf_ohm, settings.rs_ohm,
                                            settings.dmm_per_site, rb), ideal=settings.ideal)
        self.command_log: list[CommandRecord] = []
        self._log_lock = threading.Lock()
        self.resources: dict[str, str] = {}
        self._faults: dict[str, FaultSettings] = {}
        self.instruments: dict[str, Instrument] = {}
        self._servers: list[InstrumentServer] = []
        self._build()

    # --- construction --------------------------------------------------------------------
    def _common(self, role: str, number: int) -> dict:
        faults = FaultSettings(seed=self.settings.seed * 1000 + number)
        self._faults[role] = faults
        return {"role": role, "serial": f"AS{self.settings.seed:04d}-{number:02d}",
                "clock": self.clock, "faults": faults}

    def _build(self) -> None:
        s = self.settings
        m = self.model
        self.instruments["supply"] = Supply(m, s.seed, **self._common("supply", 1))
        self.instruments["force"] = ForceSource(m, s.seed, **self._common("force", 2))
        dmm_count = s.sites if s.dmm_per_site else 1
        for k in range(1, dmm_count + 1):
            role = f"dmm{k}"
            self.instruments[role] = Dmm(m, k, s.seed, s.line_hz, **self._common(role, 2 + k))
        self.instruments["switch"] = FixtureSwitch(m, **self._common("switch", 10))
        self.instruments["handler"] = Handler(m, self.parts, s.handler_index_s, s.skip_parts,
                                              **self._common("handler", 11))

    # --- life cycle ----------------------------------------------------------------------
    def start(self) -> SimBench:
        if self._servers:
            return self
        log = self._record if self.settings.log_commands else None
        try:
            for i, (role, instrument) in enumerate(self.instruments.items()):
                port = self.settings.base_port + i if self.settings.base_port else 0
                server = InstrumentServer(instrument, self._faults[role], self.clock,
                                          self.settings.host, port, log)
                self._servers.append(server)
                self.resources[role] = f"TCPIP0::{server.host}::{server.port}::SOCKET"
        except OSError:
            self.stop()
            raise
        for server in self._servers:
            server.start()
        return self

    def stop(self) -> None:
        for server in self._servers:
            server.close()
        for server in self._servers:
            server.join()
        self._servers = []

    def __enter__(self) -> SimBench:
        return self.start()

    def __exit__(self, *exc: object) -> None:
        self.stop()

    def _record(self, record: CommandRecord) -> None:
        with self._log_lock:
            self.command_log.append(record)

    # --- inspection ----------------------------------------------------------------------
    def identities(self) -> dict[str, str]:
        return {role: inst.idn() for role, inst in self.instruments.items()}

    def faults(self, role: str) -> FaultSettings:
        return self._faults[role]

    def clear_faults(self) -> None:
        for faults in self._faults.values():
            faults.clear()

    def truth(self) -> list[PartTruth]:
        with self.model.lock:
            return [dataclasses.replace(p) for p in self.parts]

    def write_truth(self, path: str | Path) -> None:
        with open(path, "w", newline="", encoding="utf-8") as handle:
            writer = csv.DictWriter(handle, fieldnames=list(TRUTH_COLUMNS))
            writer.writeheader()
            for part in self.truth():
                writer.writerow({k: (repr(v) if isinstance(v, float) else v)
                                 for k, v in truth_row(part).items()})

    def state(self) -> dict:
        with self.model.lock:
            return self.model.state(self.clock.now())

    def bench_config_text(self) -> str:
        s = self.settings
        if not self.resources:
            raise RuntimeError("start the bench first: the resources are known once bound")
        res = self.resources
        sites = range(1, s.sites + 1)
        dmm_lines = "\n".join(
            f'    - {{resource: "{res[r]}", driver: {DRIVERS["dmm"]}, timeout: 5 s}}'
            for r in sorted((r for r in res if r.startswith("dmm")), key=lambda r: int(r[3:])))
        compliance_ma = DEFAULT_COMPLIANCE_A * 1e3
        return (
            f"# Bench config for the simulated bench (seed {s.seed}), written by the simulator."
            " Invented demo bench.\n"
            "station: sim-bench\n"
            'visa_library: "@py"\n'
            "instruments:\n"
            f'  supply:  {{resource: "{res["supply"]}", driver: {DRIVERS["supply"]}, timeout: 5 s}}\n'
            f'  force:   {{resource: "{res["force"]}", driver: {DRIVERS["force"]}, timeout: 5 s}}\n'
            "  dmm:\n"
            f"{dmm_lines}\n"
            f'  switch:  {{resource: "{res["switch"]}", driver: {DRIVERS["switch"]}, timeout: 5 s}}\n'
            f'  handler: {{resource: "{res["handler"]}", driver: {DRIVERS["handler"]}, timeout: 5 s}}\n'
            "fixture:\n"
            f"  rf: {_si(s.rf_ohm, 'Ohm')}\n"
            f"  rs: {_si(s.rs_ohm, 'Ohm')}\n"
            f"  sites: {s.sites}\n"
            f"  line_frequency: {s.line_hz:g} Hz\n"
            f"  dmm_per_site: {'true' if s.dmm_per_site else 'false'}\n"
            "  bias:                 # Rb in series with each input; a channel opens its shunt\n"
            f"    rb: [{', '.join(_si(self.model.fixture.rb_of(k), 'Ohm') for k in sites)}]\n"
            f"    plus: [{', '.join(str(BIAS_PLUS_BANK * 100 + k) for k in sites)}]\n"
            f"    minus: [{', '.join(str(BIAS_MINUS_BANK * 100 + k) for k in sites)}]\n"
            "safety:\n"
            "  max_rail: 12 V\n"
            f"  current_compliance: {compliance_ma:g} mA\n"
        )

    def write_bench_config(self, path: str | Path) -> None:
        Path(path).write_text(self.bench_config_text(), encoding="utf-8")


def _si(value: float, unit: str) -> str:
    """100000 Ohm -> '100 kOhm'."""
    for factor, prefix in ((1e9, "G"), (1e6, "M"), (1e3, "k")):
        if abs(value) >= factor:
            return f"{value / factor:g} {prefix}{unit}"
    return f"{value:g} {unit}"

"""SimBench: the whole simulated bench (model, instruments, servers) behind one object.

Invented demo bench for the fictional PX-401; see model.py for the physics.
"""

from __future__ import annotations

import csv
import dataclasses
import threading
from dataclasses import dataclass, field
from pathlib import Path

import numpy as np

from sim_instruments.bench_errors import BenchErrorSpec, draw_bench_errors
from sim_instruments.clock import ModelClock
from sim_instruments.dialect import Dialect
from sim_instruments.dio import DigitalIo, WiredHandler
from sim_instruments.dmm import Dmm
from sim_instruments.faults import FaultSettings
from sim_instruments.fixture_faults import FixtureFault
from sim_instruments.force import ForceSource
from sim_instruments.generator import FunctionGenerator
from sim_instruments.handler import Handler
from sim_instruments.hislip_server import HislipServer
from sim_instruments.instrument import Instrument
from sim_instruments.model import (
    BIAS_MINUS_BANK,
    BIAS_PLUS_BANK,
    DEFAULT_COMPLIANCE_A,
    DEFAULT_RB_OHM,
    SWITCH_OVER_BANK,
    BenchModel,
    FixtureSpec,
    diff_amp_slope,
)
from sim_instruments.population import TRUTH_COLUMNS, PartTruth, make_population, truth_row
from sim_instruments.server import CommandRecord, InstrumentServer
from sim_instruments.study_plan import StudyPlan
from sim_instruments.supply import Supply
from sim_instruments.switch import FixtureSwitch
from sim_instruments.vxi11_server import Vxi11Server

DRIVERS = {"supply": "scpi-dual-supply", "force": "scpi-force-source", "dmm": "scpi-dmm",
           "switch": "scpi-fixture-switch", "handler": "scpi-handler",
           "generator": "scpi-function-generator"}
# The handshake's timing for the wired handler (its own minimums are 1 ms and 0.5 ms of
# model time, sim_instruments/dio.py); the prefix numbers parts as the simulated lot does.
HANDSHAKE_TEXT = ("handshake:\n  strobe_width: 2 ms\n  settle: 1 ms\n  start_timeout: 10 s\n"
                  "  part_id_prefix: D\n")

# How each simulated instrument can be reached: a raw SCPI socket (newline-terminated
# messages, resource ...::PORT::SOCKET), HiSLIP (END-terminated messages over two channels,
# resource ...::hislip0,PORT::INSTR) or VXI-11 on its own port, without the portmapper
# (resource ...,PORT::inst0::INSTR, which pyvisa-py reads).
TRANSPORTS = ("socket", "hislip", "vxi11")

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
    # The bench's own measurement errors (site offset, DMM gain, fixture leakage), drawn from
    # their own seed; None (the default): an exact bench.
    bench_errors: BenchErrorSpec | None = None
    # A repeatability study: the handler presents these few parts again and again.
    study_plan: StudyPlan | None = None
    # A fixture that breaks mid-lot (sim_instruments/fixture_faults.py).
    fixture_faults: tuple[FixtureFault, ...] = ()
    pat_outlier_share: float = 0.0   # in-spec outliers in the population (population.py)
    transport: str = "socket"  # every instrument's transport, one of TRANSPORTS ...
    transports: dict[str, str] = field(default_factory=dict)  # ... unless named here per role
    # How every instrument writes its replies, e.g. "number=plain,bool=word" (Dialect.parse);
    # empty: the default forms. SIMulation:DIALect changes one instrument while it runs.
    dialect: str = ""
    # How the handler is reached: "scpi" (HANDler commands) or "dio" (a digital I/O
    # instrument, role handler, with the handler wired to its lines: sim_instruments/dio.py).
    handler_interface: str = "scpi"
    # The fixture of each site: servo_loop, diff_amp, or both (relay 70k switches site k);
    # one kind for every site, or one per site. The difference amplifier's gain and resistor
    # tolerance; its mismatch is drawn per site from the seed (the truth: fixture_truth()).
    fixture_kind: str | tuple[str, ...] = "servo_loop"
    diff_gain: float = 1.0
    diff_tolerance: float = 1e-4
    generator: bool = False   # a function generator on the tied inputs (role generator)

    def transport_of(self, role: str) -> str:
        return self.transports.get(role, self.transport)


class SimBench:
    """Start with `start()` (or `with SimBench(settings) as bench:`), stop with `stop()`."""

    def __init__(self, settings: SimSettings) -> None:
        if not 1 <= settings.sites <= 4:
            raise ValueError("sites must be 1 to 4")
        if settings.line_hz not in (50.0, 60.0):
            raise ValueError("line_hz must be 50 or 60")
        for transport in (settings.transport, *settings.transports.values()):
            if transport not in TRANSPORTS:
                raise ValueError(f"unknown transport {transport!r}: use {' or '.join(TRANSPORTS)}")
        self.settings = settings
        self.clock = ModelClock(settings.speed)
        self.parts = make_population(settings.seed, settings.parts, settings.defects,
                                     settings.pat_outlier_share)
        dmms = settings.sites if settings.dmm_per_site else 1
        self.errors = (draw_bench_errors(settings.bench_errors, settings.sites, dmms)
                       if settings.bench_errors is not None else None)
        rb = tuple(settings.rb_ohm) or (DEFAULT_RB_OHM,)
        kinds = ((settings.fixture_kind,) * settings.sites if isinstance(settings.fixture_kind, str)
                 else tuple(settings.fixture_kind))
        if len(kinds) != settings.sites or not set(kinds) <= {"servo_loop", "diff_amp", "both"}:
            raise ValueError(f"fixture kinds {kinds}: one of servo_loop, diff_amp, both per site")
        self.diff_resistor_errors = tuple(draw_resistor_errors(settings.seed, site, settings.diff_tolerance)
                                          for site in range(1, settings.sites + 1))
        slopes = tuple(diff_amp_slope(e, settings.diff_gain) for e in self.diff_resistor_errors)
        self.model = BenchModel(FixtureSpec(settings.sites, settings.rf_ohm, settings.rs_ohm,
                                            settings.dmm_per_site, rb, kinds=kinds,
                                            diff_gain=settings.diff_gain, diff_slope=slopes),
                                ideal=settings.ideal, errors=self.errors)
        self.command_log: list[CommandRecord] = []
        self._log_lock = threading.Lock()
        self.resources: dict[str, str] = {}
        self._faults: dict[str, FaultSettings] = {}
        self.instruments: dict[str, Instrument] = {}
        self._servers: list[InstrumentServer] = []
        self._build()
        dialect = Dialect.parse(settings.dialect)       # ValueError says what is allowed
        for instrument in self.instruments.values():
            instrument.dialect.take(dialect)
        unknown = sorted(set(settings.transports) - set(self.instruments))
        if unknown:
            raise ValueError(f"no instrument {unknown[0]!r} on this bench: {', '.join(self.instruments)}")

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
        if s.handler_interface == "dio":
            common = self._common("handler", 11)
            handler = Handler(m, self.parts, s.handler_index_s, s.skip_parts, plan=s.study_plan,
                              fixture_faults=s.fixture_faults, seed=s.seed,
                              **{**common, "role": "wired handler", "faults": FaultSettings()})
            self.wired_handler: WiredHandler | None = WiredHandler(handler)
            self.instruments["handler"] = DigitalIo(self.wired_handler, **common)
        elif s.handler_interface == "scpi":
            self.wired_handler = None
            self.instruments["handler"] = Handler(m, self.parts, s.handler_index_s, s.skip_parts, plan=s.study_plan,
                                                  fixture_faults=s.fixture_faults, seed=s.seed,
                                                  **self._common("handler", 11))
        else:
            raise ValueError(f"unknown handler interface {s.handler_interface!r}: use scpi or dio")
        if s.generator:
            self.instruments["generator"] = FunctionGenerator(m, **self._common("generator", 12))

    # --- life cycle ----------------------------------------------------------------------
    def start(self) -> SimBench:
        if self._servers:
            return self
        log = self._record if self.settings.log_commands else None
        try:
            for i, (role, instrument) in enumerate(self.instruments.items()):
                port = self.settings.base_port + i if self.settings.base_port else 0
                if self.settings.transport_of(role) == "vxi11":
                    vxi11 = Vxi11Server(instrument, self._faults[role], self.clock,
                                        self.settings.host, port, log)
                    self._servers.append(vxi11)
                    self.resources[role] = vxi11.resource
                elif self.settings.transport_of(role) == "hislip":
                    hislip = HislipServer(instrument, self._faults[role], self.clock,
                                          self.settings.host, port, log)
                    self._servers.append(hislip)
                    self.resources[role] = hislip.resource
                else:
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

    def bench_errors_truth(self) -> dict | None:
        """The bench's own errors as drawn (None when off), for lot.json's dry_run record."""
        if self.errors is None or self.settings.bench_errors is None:
            return None
        truth: dict = {"seed": self.settings.bench_errors.seed}
        truth.update(self.errors.as_dict(self.settings.rf_ohm, self.settings.rs_ohm))
        return truth

    def fixture_truth(self) -> dict | None:
        """The difference amplifier as built (None on a servo-loop-only bench): its gain, the
        resistor errors drawn per site and the input-referred common-mode slope they give."""
        fixture = self.model.fixture
        if all(k == "servo_loop" for k in fixture.kinds):
            return None
        return {"kinds": list(fixture.kinds), "gain": fixture.diff_gain,
                "tolerance": self.settings.diff_tolerance,
                "resistor_errors": [list(e) for e in self.diff_resistor_errors],
                "cm_slope": list(fixture.diff_slope)}

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
        handler_driver = "dio-handshake" if s.handler_interface == "dio" else DRIVERS["handler"]
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
            f'  handler: {{resource: "{res["handler"]}", driver: {handler_driver}, timeout: 5 s}}\n'
            + (f'  generator: {{resource: "{res["generator"]}", driver: {DRIVERS["generator"]}, timeout: 5 s}}\n'
               if "generator" in res else "") +
            "fixture:\n"
            f"  rf: {_si(s.rf_ohm, 'Ohm')}\n"
            f"  rs: {_si(s.rs_ohm, 'Ohm')}\n"
            f"  sites: {s.sites}\n"
            f"  line_frequency: {s.line_hz:g} Hz\n"
            f"  dmm_per_site: {'true' if s.dmm_per_site else 'false'}\n"
            "  dmm_short_relays: true\n"
            f"{self._fixture_kind_text()}"
            "  bias:                 # Rb in series with each input; a channel opens its shunt\n"
            f"    rb: [{', '.join(_si(self.model.fixture.rb_of(k), 'Ohm') for k in sites)}]\n"
            f"    plus: [{', '.join(str(BIAS_PLUS_BANK * 100 + k) for k in sites)}]\n"
            f"    minus: [{', '.join(str(BIAS_MINUS_BANK * 100 + k) for k in sites)}]\n"
            "safety:\n"
            "  max_rail: 12 V\n"
            f"  current_compliance: {compliance_ma:g} mA\n"
            + (HANDSHAKE_TEXT if s.handler_interface == "dio" else "")
        )

    def _fixture_kind_text(self) -> str:
        kinds = self.model.fixture.kinds
        if all(k == "servo_loop" for k in kinds):
            return ""
        s = self.settings
        relays = (f", relays: [{', '.join(str(SWITCH_OVER_BANK * 100 + k) for k in range(1, s.sites + 1))}]"
                  if "both" in kinds else "")
        return (f"  kind: [{', '.join(kinds)}]\n"
                f"  diff_amp: {{gain: {s.diff_gain:g}, tolerance: {s.diff_tolerance * 100:g} %{relays}}}\n")

    def write_bench_config(self, path: str | Path) -> None:
        Path(path).write_text(self.bench_config_text(), encoding="utf-8")


def draw_resistor_errors(seed: int, site: int, tolerance: float) -> tuple[float, float, float, float]:
    """The four resistors' errors of one site's difference amplifier: each uniform within
    +-tolerance (invented: a resistor network's spread), from its own generator."""
    rng = np.random.default_rng([seed, 7000 + site])
    e1, e2, e3, e4 = (float(x) for x in rng.uniform(-tolerance, tolerance, 4))
    return e1, e2, e3, e4


def _si(value: float, unit: str) -> str:
    """100000 Ohm -> '100 kOhm'."""
    for factor, prefix in ((1e9, "G"), (1e6, "M"), (1e3, "k")):
        if abs(value) >= factor:
            return f"{value / factor:g} {prefix}{unit}"
    return f"{value:g} {unit}"

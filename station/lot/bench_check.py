"""The bench self-test (`station bench check`): is every instrument the bench config names there,
sane and in working order, before a lot is started on it?

One line per check, each PASS, FAIL (with what to do) or SKIP (why it was not run). The
checks, in order:

- identity ROLE: the instrument opens and answers *IDN? with maker,model,serial,firmware
  (and the bench config's `idn` text where one is given). If this fails, the instrument's
  other checks are not run;
- error queue ROLE: SYSTem:ERRor? is empty before the station has sent anything that could
  fail (errors left by an earlier program or the front panel are listed, and read off);
- *RST defaults ROLE: after *RST the levels are 0 V and the relays open, and a second *RST,
  after the settings were changed, gives the same settings back;
- outputs off ROLE (supply, force): an output switched on at 0 V with every relay open reads
  off again after OUTP OFF;
- relay N: each fixture relay, alone, reads closed after ROUT:CLOS and open after ROUT:OPEN
  (every output off meanwhile);
- DMMk shorted input: with its input shorted by the fixture's relay 40k, the DMM reads zero
  within ZERO_TOLERANCE_V (only where the fixture has short relays: fixture.dmm_short_relays);
- DMM reference: not run (our fixture has no reference source);
- supply read-back: both rails programmed to READBACK_LEVEL_V (at most the bench's max_rail)
  into the fixture's site power relays with no part seated read back within tolerance, at
  the bench's current compliance; not run unless the supply's outputs switch off;
- handler sites: the handler reports as many sites as the fixture has.

Nothing ever goes beyond the bench config's safety limits: every setting goes through the
drivers, which refuse them, and the bench is put in its safe state at the end whatever happened.
"""

from __future__ import annotations

import time
from collections.abc import Callable
from dataclasses import dataclass

from drivers.dmm import LoopDmm
from drivers.errors import InstrumentError, RequestRefused
from drivers.handler import ManualHandler, PartHandler
from drivers.registry import DMM, FORCE, HANDLER, SUPPLY, SWITCH, DriverSettings
from drivers.retry import NO_RETRY
from drivers.scpi_link import ScpiLink
from drivers.switch import SHORT
from station.config.bench_config import BenchConfig
from station.lot.bench import Bench

PASS, FAIL, SKIP = "PASS", "FAIL", "SKIP"

# A 6.5-digit DMM on its 100 mV range with its input shorted reads a few uV (common practice,
# no source); 20 uV is far below any offset that would spoil a screen and far above noise.
ZERO_TOLERANCE_V = 20e-6
# Supply read-back: 0.1 % of the setting plus 5 mV (a usual bench supply's read-back accuracy,
# common practice, no source).
READBACK_LEVEL_V = 5.0
READBACK_TOLERANCE = (1e-3, 5e-3)
SETTLE_WAIT_S = 2.0            # the rails slew to their level within this (then re-read)
OPEN_ADVICE = ("check the resource string in the bench config, the cable or network, and that "
               "the instrument is switched on and in remote")


@dataclass(frozen=True)
class CheckResult:
    name: str
    outcome: str               # PASS, FAIL or SKIP
    detail: str
    advice: str = ""

    def line(self) -> str:
        text = f"{self.outcome}  {self.name:<26} {self.detail}"
        return text + (f" -> {self.advice}" if self.advice else "")


class CheckFailed(Exception):
    """A check's own failure: what was seen, and what to do about it."""

    def __init__(self, detail: str, advice: str) -> None:
        super().__init__(detail)
        self.detail, self.advice = detail, advice


class BenchCheck:
    def __init__(self, config: BenchConfig, report: Callable[[CheckResult], None] = lambda r: None) -> None:
        self.config = config
        self.report = report
        self.results: list[CheckResult] = []
        self.links: dict[str, ScpiLink] = {}
        self.ok: set[str] = set()          # roles that identified
        self._bench: Bench | None = None

    @property
    def failed(self) -> list[CheckResult]:
        return [r for r in self.results if r.outcome == FAIL]

    def run(self) -> list[CheckResult]:
        """Run every check, then the safe state; the results in order."""
        config = self.config
        try:
            for role, instrument in config.instruments.items():
                self._identity(role, instrument.idn)
            for role in config.instruments:
                self._check(f"error queue {role}", self._error_queue, role)
            bench = self._drivers()
            self._reset_checks(bench)
            self._check("outputs off supply", self._supply_outputs_off, bench, needs=("supply", "switch"))
            self._check("outputs off force", self._force_outputs_off, bench, needs=("force", "switch"))
            self._relay_checks(bench)
            for number, dmm in enumerate(bench.dmms, start=1):
                self._zero_check(bench, number, dmm)
            self._record(CheckResult("DMM reference", SKIP, "the fixture has no reference source"))
            if self._passed("outputs off supply"):
                self._check("supply read-back", self._supply_readback, bench, needs=("supply", "switch"))
            else:
                self._record(CheckResult("supply read-back", SKIP,
                                         "not run: the supply's outputs are not known to switch off"))
            if "handler" in config.instruments:
                self._check("handler sites", self._handler_sites, bench.handler, needs=("handler",))
        finally:
            self._safe_state()
        return self.results

    # -- plumbing ----------------------------------------------------------------------------

    def _record(self, result: CheckResult) -> None:
        self.results.append(result)
        self.report(result)

    def _passed(self, name: str) -> bool:
        return any(r.name == name and r.outcome == PASS for r in self.results)

    def _check(self, name: str, action: Callable[..., str], *args: object,
               needs: tuple[str, ...] | None = None) -> None:
        roles = needs if needs is not None else tuple(a for a in args if isinstance(a, str))
        missing = [role for role in roles if role not in self.ok]
        if missing:
            self._record(CheckResult(name, SKIP, f"not run: {', '.join(missing)} did not identify"))
            return
        try:
            detail = action(*args)
        except CheckFailed as exc:
            self._record(CheckResult(name, FAIL, exc.detail, exc.advice))
        except (InstrumentError, RequestRefused) as exc:
            self._record(CheckResult(name, FAIL, str(exc),
                                     "the instrument did not do what it was told: see the message, "
                                     "then run the check again"))
        else:
            self._record(CheckResult(name, PASS, detail))

    def _identity(self, role: str, expected: str | None) -> None:
        instrument = self.config.instruments[role]
        # No resends: a self-test must see every failure, not hide it behind a retry.
        link = ScpiLink(role, instrument.resource, self.config.visa_library, instrument.timeout_s,
                        retry=NO_RETRY)
        self.links[role] = link
        try:
            link.open()
            reply = link.identify()
        except InstrumentError as exc:
            self._record(CheckResult(f"identity {role}", FAIL, exc.detail, OPEN_ADVICE))
            return
        fields = [field.strip() for field in reply.split(",")]
        if len(fields) != 4 or not all(fields[:2]) or not reply.isprintable():
            self._record(CheckResult(f"identity {role}", FAIL, f"*IDN? answered {reply[:60]!r}",
                                     "an IEEE 488.2 instrument answers maker,model,serial,firmware: "
                                     "check that the resource reaches the instrument meant"))
            return
        if expected is not None and expected not in reply:
            self._record(CheckResult(f"identity {role}", FAIL, f"{reply} does not contain {expected!r}",
                                     "a different instrument is at this address: fix the resource "
                                     "or the idn text in the bench config"))
            return
        self.ok.add(role)
        self._record(CheckResult(f"identity {role}", PASS, reply))

    def _error_queue(self, role: str) -> str:
        link = self.links[role]
        try:
            link.check_errors()
        except InstrumentError as exc:
            raise CheckFailed(f"held errors before the check: {exc.detail}",
                              "an earlier program or the front panel left them (now read off); "
                              "if they come back, find what sends the failing command") from exc
        return "empty"

    def _drivers(self) -> Bench:
        """The drivers over the check's links (built once; building sends nothing)."""
        if self._bench is not None:
            return self._bench
        config, links = self.config, self.links
        settings = DriverSettings(max_rail_v=config.max_rail_v, compliance_a=config.compliance_a,
                                  line_hz=config.line_hz, sites=config.sites,
                                  dmm_short_relays=len(config.dmm_roles) if config.dmm_short_relays else 0,
                                  handshake=config.handshake)

        def driver(name: str) -> str:
            return config.instruments[name].driver

        handler: PartHandler = (HANDLER.build(driver("handler"), links["handler"], settings)
                                if "handler" in config.instruments
                                else ManualHandler(config.sites, ask=lambda text: "", tell=lambda text: None))
        self._bench = Bench(config=config, supply=SUPPLY.build(driver("supply"), links["supply"], settings),
                            force=FORCE.build(driver("force"), links["force"], settings),
                            dmms=[DMM.build(driver(name), links[name], settings) for name in config.dmm_roles],
                            switch=SWITCH.build(driver("switch"), links["switch"], settings),
                            handler=handler)
        return self._bench

    def _safe_state(self) -> None:
        try:
            if len(self.links) == len(self.config.instruments):
                bench = self._drivers()
                log = bench.safe_state()
                if not bench.is_safe:
                    self._record(CheckResult("safe state", FAIL, "; ".join(log),
                                             "; ".join(bench.unverified or [])))
        finally:
            for link in self.links.values():
                link.close()

    # -- the checks ------------------------------------------------------------------------

    def _reset_checks(self, bench: Bench) -> None:
        def supply() -> str:
            return _reset_twice(bench.supply.link, bench.supply.rails,
                                lambda: bench.supply.set_rails(1.0, -1.0), _zero_levels)

        def force() -> str:
            return _reset_twice(bench.force.link, bench.force.level,
                                lambda: bench.force.set_level(0.5), lambda level: _zero_levels((level,)))

        def switch() -> str:
            def change() -> None:
                bench.switch.set_load(1, True)      # with every output off: nothing is powered
            return _reset_twice(bench.switch.link, bench.switch.closed, change, _all_open)

        def dmm(meter: LoopDmm) -> str:
            def settings() -> tuple[float, float, float]:
                link = meter.link
                return (link.query_float("VOLT:NPLC?"), link.query_float("VOLT:RANG?", unit="V"),
                        link.query_float("SAMP:COUN?"))
            return _reset_twice(meter.link, settings,
                                lambda: meter.configure(10.0, 1.0, autozero=False, samples=2),
                                lambda _: None)

        self._check("*RST defaults supply", supply, needs=("supply",))
        self._check("*RST defaults force", force, needs=("force",))
        for meter in bench.dmms:
            self._check(f"*RST defaults {meter.role}", dmm, meter, needs=(meter.role,))
        self._check("*RST defaults switch", switch, needs=("switch",))
        # Whatever the resets did, go on from a known state (settings are harmless to repeat).
        for action, roles in ((lambda: bench.force.set_level(0.0), ("force",)),
                              (lambda: bench.supply.set_rails(0.0, 0.0), ("supply",)),
                              (bench.switch.open_all, ("switch",))):
            if set(roles) <= self.ok:
                try:
                    action()
                except (InstrumentError, RequestRefused):
                    pass                    # the check that depends on it will say so

    def _supply_outputs_off(self, bench: Bench) -> str:
        bench.switch.open_all()
        bench.supply.set_rails(0.0, 0.0)
        bench.supply.outputs(True)
        bench.supply.outputs(False)
        states = bench.supply.outputs_state()
        if any(states):
            raise CheckFailed(f"outputs read {_on_off(states)} after OUTP OFF",
                              "switch the supply off at the instrument; have it serviced before use")
        bench.supply.link.check_errors()
        return "both outputs switch off"

    def _force_outputs_off(self, bench: Bench) -> str:
        bench.switch.open_all()
        bench.force.set_level(0.0)
        bench.force.output(True)
        bench.force.output(False)
        if bench.force.output_state():
            raise CheckFailed("output reads on after OUTP OFF",
                              "switch the force source off at the instrument; have it serviced")
        bench.force.link.check_errors()
        return "output switches off"

    def _relay_checks(self, bench: Bench) -> None:
        switch = bench.switch
        banks = [100, 300] + ([] if self.config.dmm_per_site else [200])
        channels = [c for c in switch.channels() if c // 100 * 100 in banks]
        channels += [SHORT + k for k in range(1, switch.short_relays + 1)]
        outputs_off = self._passed("outputs off supply") and self._passed("outputs off force")
        for channel in sorted(channels):
            if not outputs_off:
                # Never switch a relay that could connect a live output to the fixture.
                self._record(CheckResult(f"relay {channel}", SKIP,
                                         "not run: the outputs are not known to switch off"))
                continue
            self._check(f"relay {channel}", self._relay, bench, channel, needs=("switch", "supply", "force"))

    def _relay(self, bench: Bench, channel: int) -> str:
        if any(bench.supply.outputs_state()) or bench.force.output_state():
            raise CheckFailed("not switched: an output is on", "switch the outputs off first")
        switch = bench.switch
        switch.link.write_and_wait(f"ROUT:CLOS (@{channel})")
        closed = switch.closed()
        switch.link.write_and_wait(f"ROUT:OPEN (@{channel})")
        after = switch.closed()
        switch.link.check_errors()
        if closed != {channel}:
            seen = "reads open" if channel not in closed else f"also closed: {sorted(closed - {channel})}"
            raise CheckFailed(f"after ROUT:CLOS it {seen}",
                              f"relay {channel} or its wiring is faulty: replace it or fix the fixture")
        if after:
            raise CheckFailed(f"after ROUT:OPEN {sorted(after)} still read closed",
                              f"relay {channel} sticks: replace it before use")
        return "closes and opens"

    def _zero_check(self, bench: Bench, number: int, meter: LoopDmm) -> None:
        name = f"{meter.role} shorted input"
        if bench.switch.short_relays < number:
            self._record(CheckResult(name, SKIP, "the fixture has no short relay for this DMM "
                                     "(fixture.dmm_short_relays)"))
            return

        def zero() -> str:
            bench.switch.open_all()
            bench.switch.short_dmm_input(number, True)
            try:
                meter.configure(1.0, 0.1, autozero=True, samples=4)
                reading = meter.read()
            finally:
                bench.switch.short_dmm_input(number, False)
            meter.link.check_errors()
            if not abs(reading) <= ZERO_TOLERANCE_V:
                raise CheckFailed(f"reads {_uv(reading)} with its input shorted "
                                  f"(allowed +-{ZERO_TOLERANCE_V * 1e6:.1f} uV)",
                                  "zero the DMM (its null or zero calibration), check the input "
                                  "leads and the short relay; calibrate if it persists")
            return f"reads {_uv(reading)} (allowed +-{ZERO_TOLERANCE_V * 1e6:.1f} uV)"

        self._check(name, zero, needs=(meter.role, "switch"))

    def _supply_readback(self, bench: Bench) -> str:
        supply, switch = bench.supply, bench.switch
        level = min(READBACK_LEVEL_V, self.config.max_rail_v)
        relative, absolute = READBACK_TOLERANCE
        allowed = relative * level + absolute
        supply.configure()                          # the bench's safety compliance
        # Into the fixture's load: every site's power relay closed, no part seated.
        switch.power_sites(set(range(1, self.config.sites + 1)))
        try:
            supply.set_rails(level, -level)
            supply.outputs(True)
            deadline = time.monotonic() + SETTLE_WAIT_S
            while True:
                readings = (supply.measure_voltage("V+"), supply.measure_voltage("V-"))
                errors = (readings[0] - level, readings[1] + level)
                if all(abs(e) <= allowed for e in errors) or time.monotonic() > deadline:
                    break
                time.sleep(0.05)
            currents = (supply.measure_current("V+"), supply.measure_current("V-"))
        finally:
            supply.outputs(False)
            supply.set_rails(0.0, 0.0)
            switch.open_all()
        supply.link.check_errors()
        text = (f"set +-{level:g} V, reads {readings[0]:+.4f} V / {readings[1]:+.4f} V "
                f"(allowed +-{allowed * 1e3:.1f} mV), {_ua(currents[0])} / {_ua(currents[1])}")
        if any(abs(e) > allowed for e in errors):
            raise CheckFailed(text, "the supply's read-back or output is off: check the sense "
                              "leads and the fixture wiring; calibrate the supply")
        if any(abs(c) >= self.config.compliance_a * 0.5 for c in currents):
            raise CheckFailed(text, "current drawn with no part seated: look for a short or a "
                              "part left in a socket")
        return text

    def _handler_sites(self, handler: PartHandler) -> str:
        sites = handler.sites()
        if sites != self.config.sites:
            raise CheckFailed(f"the handler has {sites} sites, the fixture {self.config.sites}",
                              "set fixture.sites in the bench config to the handler's")
        return f"{sites} sites"


def _reset_twice(link: ScpiLink, read: Callable[[], object], change: Callable[[], None],
                 require: Callable[[object], None]) -> str:
    """*RST, read the settings, change them, *RST again: the same settings must come back."""
    link.reset()
    first = read()
    require(first)
    change()
    link.reset()
    second = read()
    link.check_errors()
    if second != first:
        raise CheckFailed(f"after *RST reads {_text(second)} where the first *RST gave {_text(first)}",
                          "the instrument does not reset: check its power-on/reset settings "
                          "(a saved state recalled at *RST?)")
    return f"reads {_text(first)} after every *RST"


def _zero_levels(levels: object) -> None:
    if not isinstance(levels, tuple) or any(abs(float(v)) > 1e-3 for v in levels):
        raise CheckFailed(f"levels after *RST are {_text(levels)}, not 0 V",
                          "an output level survives a reset: check the instrument's reset settings")


def _all_open(closed: object) -> None:
    if closed:
        raise CheckFailed(f"relays {_text(closed)} closed after *RST",
                          "a relay survives a reset: check the switch's reset settings")


def _text(value: object) -> str:
    if isinstance(value, tuple):
        return "(" + ", ".join(f"{v:g}" if isinstance(v, float) else str(v) for v in value) + ")"
    if isinstance(value, set):
        return "{" + ", ".join(str(v) for v in sorted(value)) + "}" if value else "none closed"
    return f"{value:g}" if isinstance(value, float) else str(value)


def _on_off(states: tuple[bool, ...]) -> str:
    return "/".join("on" if s else "off" for s in states)


def _uv(volts: float) -> str:
    return f"{volts * 1e6:+.1f} uV"


def _ua(amps: float) -> str:
    return f"{amps * 1e6:+.1f} uA"

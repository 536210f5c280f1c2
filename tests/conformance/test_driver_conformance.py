"""Driver conformance: what every driver of a role must do, whatever its command set, checked
through the role's interface only (docs/writing-a-driver.md).

Parametrised by driver: every driver the registry knows runs against the simulated bench.
With ``--bench BENCH.yaml`` the same checks also run against that bench's real instruments,
with the driver its config names (the real-bench cases are skipped otherwise). On a real
bench the checks stay within the bench's safety limits, keep every relay open while an
output is on, switch only at 0 V, and never move the handler.

    python -m pytest tests/conformance                      # simulated bench, every driver
    python -m pytest tests/conformance --bench my-bench.yaml -m real_bench   # your bench
"""

from __future__ import annotations

import math
from collections.abc import Iterator
from dataclasses import dataclass
from pathlib import Path

import pytest

from drivers.errors import RequestRefused
from drivers.registry import DMM, FORCE, GENERATOR, HANDLER, SUPPLY, SWITCH, DriverSettings
from drivers.scpi_link import ScpiLink
from station.config.bench_config import BenchConfig, load_bench_config, parse_bench_config

pytestmark = pytest.mark.conformance
sim_bench = pytest.importorskip("sim_instruments.bench")

LEVEL_V = 1.0          # what the checks program on a real bench: small and within any max_rail


@dataclass
class Target:
    """One bench the checks run on: its config and whether it is the simulator."""

    config: BenchConfig
    simulated: bool
    sim: object | None = None


@pytest.fixture(scope="module", params=["simulated", pytest.param("real", marks=pytest.mark.real_bench)])
def target(request) -> Iterator[Target]:
    if request.param == "real":
        path = request.config.getoption("--bench")
        if path is None:
            pytest.skip("real-bench conformance needs --bench BENCH.yaml")
        yield Target(load_bench_config(Path(path)), simulated=False)
        return
    settings = sim_bench.SimSettings(seed=4, sites=2, parts=8, speed=20.0, generator=True)
    with sim_bench.SimBench(settings) as sim:
        yield Target(parse_bench_config(sim.bench_config_text(), "sim-bench.yaml"), True, sim)


def _settings(config: BenchConfig) -> DriverSettings:
    return DriverSettings(max_rail_v=config.max_rail_v, compliance_a=config.compliance_a,
                          line_hz=config.line_hz, sites=config.sites,
                          dmm_short_relays=len(config.dmm_roles) if config.dmm_short_relays else 0,
                          handshake=config.handshake)


def _drivers(role, target: Target, instrument: str) -> list[str]:
    """Every driver of the role on the simulator; the configured one on a real bench."""
    if target.simulated:
        return sorted(name for name in role.drivers if name != "dio-handshake")
    return [target.config.instruments[instrument].driver]


@pytest.fixture
def links(target: Target) -> Iterator[dict[str, ScpiLink]]:
    opened: dict[str, ScpiLink] = {}
    for name, instrument in target.config.instruments.items():
        link = ScpiLink(name, instrument.resource, target.config.visa_library, instrument.timeout_s)
        link.open()
        link.reset()
        opened[name] = link
    yield opened
    for link in opened.values():
        link.close()


def test_supply_drivers(target, links):
    config = target.config
    for name in _drivers(SUPPLY, target, "supply"):
        supply = SUPPLY.build(name, links["supply"], _settings(config))
        supply.configure()
        links["switch"].write_and_wait("ROUT:OPEN:ALL")      # nothing connected to the rails
        supply.set_rails(LEVEL_V, -LEVEL_V)
        assert supply.rails() == pytest.approx((LEVEL_V, -LEVEL_V), abs=1e-3), name
        assert supply.outputs_state() == (False, False), name
        supply.outputs(True)
        assert supply.outputs_state() == (True, True), name
        supply.verify_state(LEVEL_V, -LEVEL_V, True)
        assert math.isfinite(supply.measure_current("V+")), name
        before = links["supply"].transactions
        with pytest.raises(RequestRefused):
            supply.set_rails(config.max_rail_v + 1.0, 0.0)
        with pytest.raises(RequestRefused):
            supply.set_compliance(config.compliance_a * 2.0)
        assert links["supply"].transactions == before, f"{name} sent a refused setting"
        supply.ramp_down_and_off(steps=2, step_delay_s=0.0)   # ends with a verified 0 V, off
        assert supply.rails() == pytest.approx((0.0, 0.0), abs=1e-3), name
        links["supply"].check_errors()


def test_force_drivers(target, links):
    for name in _drivers(FORCE, target, "force"):
        force = FORCE.build(name, links["force"], _settings(target.config))
        force.configure()
        force.set_level(-LEVEL_V / 2)
        assert force.level() == pytest.approx(-LEVEL_V / 2, abs=1e-6), name
        force.output(True)
        assert force.output_state() is True, name
        with pytest.raises(RequestRefused):
            force.set_level(target.config.max_rail_v + 1.0)
        force.zero_and_off()
        assert force.output_state() is False and force.level() == 0.0, name
        links["force"].check_errors()


def test_dmm_drivers(target, links):
    for instrument in target.config.dmm_roles:
        for name in _drivers(DMM, target, instrument):
            dmm = DMM.build(name, links[instrument], _settings(target.config))
            dmm.configure(nplc=1.0, range_v=10.0, autozero=False, samples=3)
            assert dmm.integration_time_s == pytest.approx(3 / target.config.line_hz), name
            assert len(dmm.read_samples()) == 3, name
            dmm.start()
            readings = dmm.fetch()
            assert len(readings) == 3 and all(isinstance(v, float) for v in readings), name
            with pytest.raises(RequestRefused):
                dmm.configure(nplc=1.0, range_v=3.0, autozero=False)   # not a range
            links[instrument].check_errors()


def test_dmm_drivers_read_ac(target, links):
    for instrument in target.config.dmm_roles:
        for name in _drivers(DMM, target, instrument):
            dmm = DMM.build(name, links[instrument], _settings(target.config))
            dmm.configure_ac(range_v=1.0, lowest_hz=200.0, aperture_s=0.01, samples=2)
            # The 200 Hz filter settles in 25 periods of its corner, then two 10 ms apertures.
            assert dmm.integration_time_s == pytest.approx(25 / 200 + 0.02), name
            readings = dmm.read_samples()
            assert len(readings) == 2 and all(v >= 0.0 for v in readings), name   # an RMS magnitude
            with pytest.raises(RequestRefused):
                dmm.configure_ac(range_v=1.0, lowest_hz=1e6, aperture_s=0.01)   # beyond its band
            dmm.configure(nplc=1.0, range_v=10.0, autozero=False)                 # back to DC
            assert dmm.integration_time_s == pytest.approx(1 / target.config.line_hz), name
            links[instrument].check_errors()


def test_generator_drivers(target, links):
    if "generator" not in target.config.instruments:
        pytest.skip("the bench has no function generator")
    for name in _drivers(GENERATOR, target, "generator"):
        generator = GENERATOR.build(name, links["generator"], _settings(target.config))
        generator.configure()
        assert generator.output_state() is False, name
        generator.set_sine(1234.5, 0.5)
        assert generator.frequency() == pytest.approx(1234.5), name
        assert generator.amplitude_vrms() == pytest.approx(0.5), name
        generator.output(True)
        assert generator.output_state() is True, name
        before = links["generator"].transactions
        with pytest.raises(RequestRefused):
            generator.set_sine(1e3, target.config.max_rail_v)     # peak sqrt(2) x beyond the limit
        with pytest.raises(RequestRefused):
            generator.set_sine(1e7, 0.1)                           # beyond the instrument
        assert links["generator"].transactions == before, f"{name} sent a refused setting"
        generator.zero_and_off()
        assert generator.output_state() is False, name
        links["generator"].check_errors()


def test_switch_drivers(target, links):
    # The links were opened with *RST: every output is off while relays move.
    for name in _drivers(SWITCH, target, "switch"):
        switch = SWITCH.build(name, links["switch"], _settings(target.config))
        switch.open_all()
        for site in range(1, target.config.sites + 1):
            switch.set_load(site, True)
            assert switch.closed() == {300 + site}, name
            switch.set_load(site, False)
        switch.power_sites({1})
        assert switch.powered_sites() == {1}, name
        with pytest.raises(RequestRefused):
            switch.power_sites({target.config.sites + 1})
        switch.open_all()
        switch.confirm_open()
        links["switch"].check_errors()


def test_handler_drivers(target, links):
    if "handler" not in target.config.instruments:
        pytest.skip("the bench has no handler (manual socket)")
    for name in _drivers(HANDLER, target, "handler"):
        handler = HANDLER.build(name, links["handler"], _settings(target.config))
        assert handler.sites() == target.config.sites, name
        with pytest.raises(RequestRefused):
            handler.assign_bin(1, 100)                         # hard bins are 1 to 99
        if target.simulated:                                   # never move a real handler
            ids = handler.next_index()
            assert ids is not None and len(ids) == target.config.sites, name
            for site, part in enumerate(ids, start=1):
                if part:
                    handler.assign_bin(site, 1)

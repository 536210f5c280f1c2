"""The dialect matrix: every reply form real instruments use for the same meaning, through
every driver that reads it. The simulator is told which form to answer in
(SIMulation:DIALect, docs/bench-commands.md); each test reads the same state in every form.

The forms: IEEE 488.2 numeric response data NR1/NR2/NR3 with or without sign (IEEE 488.2
section 8.7, from memory), a unit after the number (common practice, no source), SCPI's
overload 9.9E37 written short or in full (SCPI-1999, from memory), booleans as 1/0 or ON/OFF,
and the error queue's "no error" entry as 0 or +0.
"""

from __future__ import annotations

import math
import time
from collections.abc import Iterator

import pytest

from drivers.errors import InstrumentBadReply, InstrumentReportedError
from drivers.scpi_values import parse_error_entry, parse_scpi_bool, parse_scpi_float
from drivers.supply import ApplySupply, DualRailSupply
from station.config.bench_config import parse_bench_config
from station.lot.bench import Bench, open_bench

sim_bench = pytest.importorskip("sim_instruments.bench")
from sim_instruments.dialect import Dialect  # noqa: E402

# (number, overload, boolean, error queue): each form once, then two mixtures.
DIALECTS = [
    ("SCIE", "LONG", "NUMB", "PLAI"),     # the simulator's default
    ("UNSI", "LONG", "NUMB", "PLAI"),
    ("PLAI", "LONG", "NUMB", "PLAI"),
    ("UNIT", "LONG", "NUMB", "PLAI"),
    ("SCIE", "SHOR", "NUMB", "PLAI"),
    ("SCIE", "LONG", "WORD", "PLAI"),
    ("SCIE", "LONG", "NUMB", "SIGN"),
    ("UNIT", "SHOR", "WORD", "SIGN"),
    ("PLAI", "SHOR", "WORD", "SIGN"),
]


@pytest.fixture(scope="module")
def sim() -> Iterator[object]:
    settings = sim_bench.SimSettings(seed=5, sites=2, parts=40, speed=20.0)
    with sim_bench.SimBench(settings).start() as running:
        yield running


@pytest.fixture(scope="module", params=DIALECTS, ids=["-".join(d) for d in DIALECTS])
def bench(sim, request) -> Iterator[Bench]:
    opened = open_bench(parse_bench_config(sim.bench_config_text(), "sim-bench.yaml"))
    number, overload, boolean, error = request.param
    for link in opened.all_links().values():
        link.write(f"SIM:DIAL:NUMB {number};OVER {overload};BOOL {boolean};ERR {error}")
    yield opened
    for link in opened.all_links().values():
        link.write("SIM:DIAL:NUMB SCIE;OVER LONG;BOOL NUMB;ERR PLAI")
    opened.safe_state()
    opened.close()


@pytest.mark.parametrize("driver", [DualRailSupply, ApplySupply])
def test_supply_reads_back_in_every_form(bench, sim, driver):
    supply = driver(bench.supply.link, bench.config.max_rail_v, bench.config.compliance_a)
    supply.configure(0.02)
    bench.switch.power_sites({1})
    supply.set_rails(5.25, -4.75)
    supply.outputs(True)
    supply.verify_state(5.25, -4.75, True)        # levels and outputs read back, any form
    assert supply.rails() == (5.25, -4.75)
    assert supply.outputs_state() == (True, True)
    time.sleep(0.1)
    assert supply.measure_voltage("V+") == pytest.approx(5.25, abs=0.01)
    assert supply.measure_current("V+") == pytest.approx(sim.state()["supply"]["ch1"]["current_a"], abs=2e-6)
    supply.ramp_down_and_off(steps=2, step_delay_s=0.0)  # ends in verify_off: 0 V and OFF read back
    assert supply.outputs_state() == (False, False)


def test_force_source_in_every_form(bench):
    bench.force.set_level(-1.5)
    assert bench.force.level() == -1.5
    bench.force.output(True)
    assert bench.force.output_state() is True
    bench.force.zero_and_off()
    assert bench.force.level() == 0.0 and bench.force.output_state() is False


def test_dmm_overload_and_readings_in_every_form(bench):
    assert bench.handler.next_index() is not None  # parts in both sites
    bench.supply.set_rails(5.0, -5.0)
    bench.supply.outputs(True)
    bench.switch.power_sites({1})                  # site 2 unpowered: its node is overload
    assert bench.dmms[1].read() == math.inf
    reading = bench.dmms[0].read()
    assert math.isfinite(reading) and abs(reading) < 10.0
    assert bench.dmms[0].link.query_float("VOLT:NPLC?") == 1.0
    bench.handler.assign_bin(1, 1)
    bench.handler.assign_bin(2, 1)


def test_switch_states_in_every_form(bench):
    bench.switch.power_sites({2})
    bench.switch.set_load(1, True)
    assert bench.switch.closed() == {102, 301}
    bench.switch.open_all()
    bench.switch.confirm_open()


def test_error_queue_in_every_form(bench):
    for link in bench.all_links().values():
        link.check_errors()                         # "0" or "+0": empty, nothing raised
        link.write("SIM:FAUL:ERR -222")
        with pytest.raises(InstrumentReportedError) as caught:
            link.check_errors()
        assert [code for code, _ in caught.value.errors] == [-222]


def test_a_unit_other_than_the_one_expected_is_a_bad_reply(bench):
    bench.supply.link.write("SIM:DIAL:NUMB UNIT")
    # MEAS:CURR? answers in A: read as volts it is refused, never taken for a voltage.
    with pytest.raises(InstrumentBadReply, match="unit"):
        bench.supply.link.query_float("INST:NSEL 1;:MEAS:CURR?", unit="V", retry=False)


@pytest.mark.parametrize("value", [0.0, 1.0, -1.0, 1.25e-6, -3.2e-9, 12.000001, 999.5])
@pytest.mark.parametrize("form", ["SCIENTIFIC", "UNSIGNED", "PLAIN", "UNITS"])
def test_every_number_form_parses_back(value, form):
    text = Dialect(number_form=form).number(value, "V")
    # 9 significant digits in E notation, 15 decimals in plain notation.
    assert parse_scpi_float(text, "V") == pytest.approx(value, rel=1e-8, abs=1e-15)


@pytest.mark.parametrize("form", ["LONG", "SHORT"])
def test_overload_forms(form):
    assert parse_scpi_float(Dialect(overload_form=form).overload()) == math.inf
    assert parse_scpi_float("-" + Dialect(overload_form=form).overload().lstrip("+")) == -math.inf


def test_bool_and_error_entry_forms():
    for on in (True, False):
        for form in ("NUMBER", "WORD"):
            assert parse_scpi_bool(Dialect(boolean_form=form).flag(on)) is on
    assert parse_scpi_bool("+1") and not parse_scpi_bool("0.0")
    for form in ("PLAIN", "SIGNED"):
        assert parse_error_entry(Dialect(error_form=form).error_entry(0, "No error")) == (0, "No error")
        assert parse_error_entry(Dialect(error_form=form).error_entry(-113, "Undefined header")) == \
            (-113, "Undefined header")
    assert parse_error_entry("+0,No error") == (0, "No error")


@pytest.mark.parametrize("text", ["inf", "nan", "1.0 A", "1,0", "--1", "1.0E", "0x10"])
def test_what_is_still_refused(text):
    with pytest.raises(ValueError):
        parse_scpi_float(text, "V")


def test_the_bench_config_selects_the_apply_supply(sim):
    text = sim.bench_config_text().replace("driver: scpi-dual-supply", "driver: scpi-apply-supply")
    with open_bench(parse_bench_config(text, "apply-bench.yaml")) as opened:
        assert type(opened.supply) is ApplySupply
        opened.supply.set_rails(3.0, -3.0)
        assert sim.state()["supply"]["ch1"]["programmed_v"] == 3.0
        assert sim.state()["supply"]["ch2"]["programmed_v"] == -3.0
        assert sim.state()["supply"]["ch1"]["compliance_a"] == pytest.approx(opened.config.compliance_a)
    assert sim.state()["supply"]["ch1"]["programmed_v"] == 0.0       # the safe state, by APPLy

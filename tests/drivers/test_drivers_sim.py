"""Drivers and bench opener against the simulated bench: real sockets, real pyvisa-py."""

from __future__ import annotations

import math
import time
from collections.abc import Iterator

import pytest

from drivers.dmm import LoopDmm
from drivers.errors import (
    InstrumentBadReply,
    InstrumentConnectionLost,
    InstrumentOpenError,
    InstrumentReportedError,
    InstrumentTimeout,
    RequestRefused,
)
from drivers.handler import ScpiHandler
from drivers.retry import NO_RETRY
from drivers.scpi_link import check_errors_together
from station.config.bench_config import BenchConfig, parse_bench_config
from station.lot.bench import Bench, open_bench

sim_bench = pytest.importorskip("sim_instruments.bench")

# Short timeouts where a fault makes the link wait for a reply that never comes.
FAULT_TIMEOUT_S = 0.4


# Every test runs over both transports the simulated bench serves: raw SCPI sockets and HiSLIP.
@pytest.fixture(scope="module", params=sim_bench.TRANSPORTS)
def sim(request) -> Iterator[object]:
    settings = sim_bench.SimSettings(seed=1, sites=2, parts=8, speed=20.0, transport=request.param)
    with sim_bench.SimBench(settings).start() as running:
        yield running


@pytest.fixture
def config(sim) -> BenchConfig:
    return parse_bench_config(sim.bench_config_text(), "sim-bench.yaml")


@pytest.fixture
def bench(sim, config) -> Iterator[Bench]:
    sim.clear_faults()
    opened = open_bench(config)
    yield opened
    sim.clear_faults()
    opened.safe_state()
    opened.close()


def test_every_role_identifies(bench):
    identities = bench.identities()
    assert set(identities) == {"supply", "force", "dmm1", "dmm2", "switch", "handler"}
    assert all(reply.startswith("AMPSCREEN-SIM,") for reply in identities.values())
    assert len(set(identities.values())) == 6     # six different instruments


def test_open_leaves_known_state(bench, sim):
    state = sim.state()
    assert not state["supply"]["ch1"]["output"] and not state["supply"]["ch2"]["output"]
    assert state["supply"]["ch1"]["compliance_a"] == pytest.approx(bench.config.compliance_a)
    assert not state["force"]["output"] and state["relays_closed"] == []


def test_error_queue_empty_after_configure(bench):
    bench.supply.configure(0.01)
    bench.force.configure()
    for dmm in bench.dmms:
        dmm.configure(nplc=10, range_v=1.0, autozero=False, samples=3)
    for link in bench.all_links().values():
        assert link.query_float("SYST:ERR:COUN?") == 0


def test_unknown_command_reports_113(bench):
    link = bench.dmms[0].link
    link.write("FROB:NICATE 3")
    with pytest.raises(InstrumentReportedError) as caught:
        link.check_errors()
    # -113 "Undefined header" (SCPI-1999 vol. 2, 21.8 error list, from memory;
    # docs/bench-commands.md).
    assert caught.value.codes == [-113]
    assert caught.value.role == "dmm1" and caught.value.command == "FROB:NICATE 3"
    link.check_errors()   # the queue is empty again


def test_a_setting_and_its_error_check_share_one_round_trip(bench):
    link = bench.dmms[0].link
    before = link.transactions
    bench.dmms[0].configure(nplc=1, range_v=1.0, autozero=True, samples=2)
    assert link.transactions == before + 1       # setting, *OPC? and SYST:ERR? in one message
    assert link.query_float("SYST:ERR:COUN?") == 0
    # Two execution errors in one message: the first comes with the reply, the rest are read
    # after it, and the queue is left empty (-222 data out of range, SCPI-1999 vol. 2, 21.8,
    # from memory; the supply spans +-15 V per docs/bench-commands.md).
    supply = bench.supply.link
    with pytest.raises(InstrumentReportedError) as caught:
        supply.write_and_check("INST:NSEL 1;:VOLT 20;:VOLT 30")
    assert caught.value.codes == [-222, -222]
    assert caught.value.command == "INST:NSEL 1;:VOLT 20;:VOLT 30"
    assert supply.query_float("SYST:ERR:COUN?") == 0


def test_error_queues_of_every_link_are_read_together_and_to_their_end(bench):
    links = list(bench.all_links().values())
    before = [link.transactions for link in links]
    check_errors_together(links)                    # clean queues: one SYST:ERR? each
    assert [link.transactions for link in links] == [n + 1 for n in before]
    bench.supply.link.write("INST:NSEL 1;:VOLT 20;:VOLT 30")    # -222 twice
    bench.dmms[0].link.write("FROB 1")                          # -113
    with pytest.raises(InstrumentReportedError) as caught:
        check_errors_together(links)
    assert caught.value.role == "supply" and caught.value.codes == [-222, -222]
    assert caught.value.command == "INST:NSEL 1;:VOLT 20;:VOLT 30"   # blamed on the last command
    assert all(link.query_float("SYST:ERR:COUN?") == 0 for link in links)


def test_out_of_range_raw_gives_222_but_driver_refuses_first(bench, sim):
    link = bench.supply.link
    link.write("INST:NSEL 1;:VOLT 20")
    with pytest.raises(InstrumentReportedError) as caught:
        link.check_errors()
    # -222 "Data out of range" (SCPI-1999 vol. 2, 21.8, from memory; the supply spans +-15 V per
    # docs/bench-commands.md).
    assert -222 in caught.value.codes
    bench.supply.set_rails(3.0, -3.0)
    before = link.transactions
    with pytest.raises(RequestRefused) as refused:
        bench.supply.set_rails(20.0, -3.0)
    assert refused.value.role == "supply" and "V+" in str(refused.value)
    assert link.transactions == before                     # nothing was sent
    assert sim.state()["supply"]["ch1"]["programmed_v"] == pytest.approx(3.0)

    force_before = bench.force.link.transactions
    with pytest.raises(RequestRefused):
        bench.force.set_level(10.5)                       # force spans +-10 V
    assert bench.force.link.transactions == force_before
    assert sim.state()["force"]["level_v"] == 0.0


def test_set_rails_refuses_beyond_max_rail_and_reversed(bench, sim):
    assert bench.config.max_rail_v == 12.0
    before = bench.supply.link.transactions
    for v_pos, v_neg in [(12.5, -5.0), (5.0, -12.01), (-1.0, 1.0), (math.nan, 0.0)]:
        with pytest.raises(RequestRefused):
            bench.supply.set_rails(v_pos, v_neg)
    with pytest.raises(RequestRefused):
        bench.supply.set_compliance(0.05)                 # above the 20 mA safety compliance
    assert bench.supply.link.transactions == before
    bench.supply.set_rails(12.0, -12.0)                   # the limit itself is allowed
    assert bench.supply.rails() == (12.0, -12.0)
    assert sim.state()["supply"]["ch2"]["programmed_v"] == -12.0


def test_supply_readback(bench, sim):
    bench.switch.power_sites({1})
    bench.supply.set_rails(5.0, -5.0)
    bench.supply.outputs(True)
    assert bench.supply.outputs_state() == (True, True)
    time.sleep(0.1)
    assert bench.supply.measure_voltage("V+") == pytest.approx(5.0, abs=0.01)
    assert bench.supply.measure_voltage("V-") == pytest.approx(-5.0, abs=0.01)
    # The simulator's draw on V+ (sim_instruments/model.py): the seated part's Iq at the 10 V
    # span, or only the fixture's leakage when site 1 holds no part or an open one. Read-back
    # noise is 0.1 uA RMS, so 1 uA is 10 sigma and far apart from either.
    from sim_instruments.model import OPEN_LEAKAGE_A

    site = sim.state()["sites"][1]
    part = next((p for p in sim.truth() if p.part_id == site["part"]), None)
    expected = part.iq(10.0) if part is not None and site["contact"] else OPEN_LEAKAGE_A
    assert bench.supply.measure_current("V+") == pytest.approx(expected, abs=1e-6)
    with pytest.raises(RequestRefused):
        bench.supply.measure_current("V0")  # type: ignore[arg-type]


def test_dmm_reads_overload_on_unpowered_site(bench):
    bench.supply.set_rails(5.0, -5.0)
    bench.supply.outputs(True)
    bench.switch.power_sites({1})                         # site 2 stays unpowered
    assert bench.dmms[1].read() == math.inf
    assert bench.dmms[1].read_samples() == [math.inf]


def test_two_dmms_integrate_at_once(bench):
    for dmm in bench.dmms:
        dmm.configure(nplc=50, range_v=10.0, autozero=True, samples=2)
    # 2 samples x 50 NPLC / 50 Hz x 2 (autozero) = 4 s of integration: N NPLC take N / f_line
    # seconds, autozero doubles it (common practice, no source; docs/methods.md "Integration time").
    assert bench.dmms[0].integration_time_s == pytest.approx(4.0)
    started = time.perf_counter()
    bench.dmms[0].read_samples()
    one = time.perf_counter() - started
    started = time.perf_counter()
    for dmm in bench.dmms:
        dmm.start()
    results = [dmm.fetch() for dmm in bench.dmms]
    both = time.perf_counter() - started
    assert [len(r) for r in results] == [2, 2]
    assert one > 0.05                                      # integration really takes time
    assert both < 1.6 * one                                # concurrent, not one after the other


def _recording(call, name: str, role: str, events: list):
    def recorded(*args, **kwargs):
        events.append((name, role))
        return call(*args, **kwargs)
    return recorded


def test_dmms_read_together_are_all_triggered_before_any_reply_is_read(bench, monkeypatch):
    events: list[tuple[str, str]] = []
    for dmm in bench.dmms:
        dmm.configure(nplc=1, range_v=1.0, autozero=False, samples=1)
        instrument = dmm.link._instrument
        for name in ("write", "read"):
            monkeypatch.setattr(instrument, name, _recording(getattr(instrument, name), name, dmm.role, events))
    read = LoopDmm.read_together(bench.dmms, [3, 3])
    assert events == [("write", "dmm1"), ("write", "dmm2"), ("read", "dmm1"), ("read", "dmm2")]
    assert [len(values) for _, values in read] == [3, 3]
    assert [dmm.samples for dmm in bench.dmms] == [3, 3]    # the new count stays set
    assert read[0][0] <= read[1][0]                         # the time each query went out


def test_a_garbled_reply_among_dmms_read_together_is_asked_again_alone(bench, sim):
    dmm1, dmm2 = bench.dmms
    for dmm in bench.dmms:
        dmm.configure(nplc=1, range_v=1.0, autozero=False, samples=2)
    before = (dmm1.link.transactions, dmm2.link.transactions, dmm2.link.retries)
    sim.faults("dmm2").garbage_next = 1
    read = LoopDmm.read_together(bench.dmms, [2, 2])
    assert [len(values) for _, values in read] == [2, 2]     # (overload readings: no part is powered)
    assert dmm1.link.transactions == before[0] + 1
    assert dmm2.link.transactions >= before[1] + 2 and dmm2.link.retries == before[2] + 1
    dmm2.link.retry = NO_RETRY                 # no retry: the failure is raised, named
    sim.faults("dmm2").garbage_next = 1
    with pytest.raises(InstrumentBadReply) as caught:
        LoopDmm.read_together(bench.dmms, [2, 2])
    assert caught.value.role == "dmm2"


def test_read_timeout_is_extended_by_integration_time(bench):
    dmm = bench.dmms[0]
    dmm.configure(nplc=100, range_v=10.0, autozero=True, samples=3)
    # 3 x 100 NPLC / 50 Hz x 2 (autozero) = 12 model-s (N/50 s; common practice, no source)
    dmm.link.timeout_s = 0.2                # shorter than the 12 model-s / speed 20 = 0.6 s read
    assert len(dmm.read_samples()) == 3


def test_switch_relays(bench, sim):
    switch = bench.switch
    switch.power_sites({1, 2})
    switch.power_sites({2})
    switch.route_to_dmm(1)
    switch.route_to_dmm(2)                  # opens 201 first: never two scanner relays closed
    switch.set_load(1, True)
    assert switch.closed() == {102, 202, 301}
    assert sorted(sim.state()["relays_closed"]) == [102, 202, 301]
    assert switch.powered_sites() == {2}
    switch.route_to_dmm(None)
    switch.set_load(1, False)
    assert switch.closed() == {102}
    before = switch.link.transactions
    with pytest.raises(RequestRefused):
        switch.power_sites({3})             # the fixture has 2 sites
    with pytest.raises(RequestRefused):
        switch.set_load(0, True)
    assert switch.link.transactions == before
    switch.open_all()
    assert switch.closed() == set()


def test_scpi_handler_indexes_and_bins(bench):
    handler = bench.handler
    assert isinstance(handler, ScpiHandler) and handler.sites() == 2
    first = handler.next_index()
    assert first is not None and len(first) == 2 and all(first)
    handler.assign_bin(1, 1)
    handler.assign_bin(2, 5, "fail")
    handler.link.check_errors()
    with pytest.raises(RequestRefused):
        handler.assign_bin(1, 100)
    handler.reseat(1)
    handler.link.check_errors()


def test_timeout_names_role_and_command_and_link_recovers(bench, sim):
    link = bench.force.link
    link.retry = NO_RETRY       # one transaction; the retry policy is tested in test_reliability_retry.py
    link.timeout_s = FAULT_TIMEOUT_S
    sim.faults("force").timeout_next = 1
    with pytest.raises(InstrumentTimeout) as caught:
        link.query("VOLT?")
    assert caught.value.role == "force" and caught.value.command == "VOLT?"
    assert str(caught.value) == (f"force ({link.resource}): 'VOLT?' timed out after "
                                 f"{FAULT_TIMEOUT_S:.1f} s")
    assert bench.force.level() == 0.0       # next query answered normally


def test_late_reply_does_not_answer_the_next_query(bench, sim):
    link = bench.force.link
    link.retry = NO_RETRY
    link.timeout_s = FAULT_TIMEOUT_S
    sim.faults("force").latency_s = 20 * 0.6          # 0.6 s of wall time at speed 20
    with pytest.raises(InstrumentTimeout):
        link.query("*IDN?")
    sim.faults("force").latency_s = 0.0
    time.sleep(0.4)                                    # the late *IDN? reply arrives meanwhile
    assert bench.force.level() == 0.0


def test_dropped_connection_then_reconnect(bench, sim):
    link = bench.dmms[1].link
    link.retry = NO_RETRY
    link.timeout_s = FAULT_TIMEOUT_S
    sim.faults("dmm2").drop_after = 1
    with pytest.raises(InstrumentConnectionLost) as caught:
        for _ in range(3):
            link.query("*IDN?")
    assert caught.value.role == "dmm2" and caught.value.command == "*IDN?"
    link.reconnect()
    assert link.identify().startswith("AMPSCREEN-SIM,")


def test_a_peer_close_seen_mid_read_is_a_lost_connection(bench, monkeypatch):
    # pyvisa-py's HiSLIP reader raises RuntimeError("Connection was dropped by server.") when
    # the socket reads empty after select (pyvisa_py/protocols/hislip.py, receive_exact_into);
    # whether a drop shows up that way or as a timeout depends on timing, so force that path.
    link = bench.dmms[1].link
    link.retry = NO_RETRY
    instrument = link._instrument

    def dropped() -> str:
        raise RuntimeError("Connection was dropped by server.")

    monkeypatch.setattr(instrument, "read", dropped)
    with pytest.raises(InstrumentConnectionLost) as caught:
        link.query("*IDN?")
    assert "closed the connection" in str(caught.value)
    monkeypatch.undo()
    link.reconnect()
    assert link.identify().startswith("AMPSCREEN-SIM,")


def test_garbage_reply_is_bad_reply(bench, sim):
    link = bench.supply.link
    link.retry = NO_RETRY
    for _ in range(3):                      # the sim garbles in several ways; try a few
        sim.faults("supply").garbage_next = 1
        with pytest.raises(InstrumentBadReply) as caught:
            bench.supply.measure_voltage("V+")
        assert caught.value.role == "supply" and "MEAS:VOLT?" in caught.value.command
    assert bench.supply.measure_voltage("V+") == pytest.approx(0.0, abs=1e-3)
    link.check_errors()


def test_safe_state_turns_everything_off_when_force_fails(bench, sim):
    bench.switch.power_sites({1, 2})
    bench.supply.set_rails(5.0, -5.0)
    bench.supply.outputs(True)
    bench.force.set_level(1.0)
    bench.force.output(True)
    bench.force.link.timeout_s = FAULT_TIMEOUT_S
    bench.force.link.retry = NO_RETRY                 # keeps the dead instrument's part short
    sim.faults("force").timeout_next = 10             # defeats the reconnect and the second try
    log = bench.safe_state()
    assert log[0].startswith("force:") and "NOT VERIFIED" in log[0] and "timed out" in log[0]
    assert log[1].startswith("supply:") and log[1].endswith(": ok")
    assert log[2].startswith("switch:") and log[2].endswith(": ok")
    state = sim.state()
    for channel in ("ch1", "ch2"):
        assert not state["supply"][channel]["output"]
        assert state["supply"][channel]["programmed_v"] == 0.0
    assert state["relays_closed"] == []


def test_safe_state_reconnects_after_a_drop(bench, sim):
    bench.force.set_level(2.0)
    bench.force.output(True)
    bench.force.link.timeout_s = FAULT_TIMEOUT_S
    sim.faults("force").drop_after = 1
    log = bench.safe_state()
    assert log[0].startswith("force:") and "ok after" in log[0]
    assert bench.force.link.reconnects >= 1
    assert sim.state()["force"] == {"level_v": 0.0, "output": False}


def test_open_refuses_wrong_identity(sim):
    text = sim.bench_config_text().replace("driver: scpi-dmm, timeout: 5 s}",
                                           'driver: scpi-dmm, timeout: 5 s, idn: "NOTME"}', 1)
    with pytest.raises(InstrumentOpenError) as caught:
        open_bench(parse_bench_config(text))
    assert caught.value.role == "dmm1" and "NOTME" in str(caught.value)


def test_open_names_the_instrument_that_is_not_there(sim):
    resource = sim.resources["switch"]
    port = resource.split("::")[2].split(",")[-1]     # PORT, or hislip0,PORT
    nowhere = resource.replace(port, "1")             # nothing listens on port 1
    text = sim.bench_config_text().replace(resource, nowhere)
    with pytest.raises(InstrumentOpenError) as caught:
        open_bench(parse_bench_config(text))
    assert caught.value.role == "switch" and nowhere in str(caught.value)


def test_open_without_handler_uses_manual_prompts(sim):
    lines = [line for line in sim.bench_config_text().splitlines() if "handler:" not in line]
    told: list[str] = []
    answers = iter(["P1", "-"])
    bench = open_bench(parse_bench_config("\n".join(lines)), ask=lambda _: next(answers),
                       tell=told.append)
    try:
        assert bench.identities()["handler"].startswith("manual")
        assert "handler" not in bench.all_links()
        assert bench.handler.next_index() == ["P1", None]
        bench.handler.assign_bin(1, 2)
        assert told == ["Site 1: put the part 'P1' in bin 2."]
    finally:
        bench.close()

"""Each injected fault produces the failure it names, and the bench keeps serving after it."""

from __future__ import annotations

import time

import pytest
from pyvisa.errors import VisaIOError

from sim_instruments.bench import SimBench, SimSettings
from sim_instruments.serve import parse_fault_option
from sim_instruments.visa_client import open_resource

SPEED = 10.0


@pytest.fixture
def sim():
    with SimBench(SimSettings(speed=SPEED, sites=1, parts=2)) as bench:
        yield bench


def idn_ok(sim, role="force") -> bool:
    inst = open_resource(sim.resources[role], timeout_ms=2000)
    try:
        return inst.query("*IDN?") == sim.identities()[role]
    finally:
        inst.close()


def test_latency_delays_every_reply(sim):
    inst = open_resource(sim.resources["force"])
    inst.write("SIM:FAUL:LAT 2")  # 2 model seconds = 0.2 s of wall time at speed 10
    start = time.perf_counter()
    inst.query("*IDN?")
    inst.query("*OPC?")
    elapsed = time.perf_counter() - start
    inst.write("SIM:FAUL:CLE")
    start = time.perf_counter()
    inst.query("*IDN?")
    quick = time.perf_counter() - start
    inst.close()
    assert elapsed >= 0.38
    assert quick < 0.15


def test_timeout_swallows_the_next_replies(sim):
    inst = open_resource(sim.resources["force"], timeout_ms=300)
    inst.write("SIMulation:FAULt:TIMEout 1")
    with pytest.raises(VisaIOError):
        inst.query("*IDN?")
    assert inst.query("*IDN?") == sim.identities()["force"]
    sim.faults("force").timeout_next = 1  # the Python API does the same
    with pytest.raises(VisaIOError):
        inst.query("*OPC?")
    assert inst.query("*OPC?") == "1"
    inst.close()


def test_drop_closes_the_connection_and_new_ones_work(sim):
    inst = open_resource(sim.resources["force"], timeout_ms=500)
    inst.write("SIM:FAUL:DROP 2")
    # *OPC? answers 1 (IEEE 488.2, 10.19; from memory)
    assert inst.query("*OPC?") == "1"   # message 1 of 2
    assert inst.query("*OPC?") == "1"   # message 2: served, then the connection closes
    with pytest.raises(VisaIOError):
        inst.query("*IDN?")
    inst.close()
    assert idn_ok(sim)


def test_garbage_garbles_the_next_replies(sim):
    inst = open_resource(sim.resources["force"])
    sim.faults("force").garbage_next = 3
    expected = sim.identities()["force"]
    for _ in range(3):
        try:
            reply = inst.query("*IDN?")
        except UnicodeDecodeError:
            reply = None  # binary junk
        assert reply != expected
    assert inst.query("*IDN?") == expected
    inst.close()


def test_error_push_through_scpi_and_api(sim):
    inst = open_resource(sim.resources["supply"])
    assert inst.query("*CLS;SIM:FAUL:ERR -350;*OPC?") == "1"  # processed before the API push
    sim.faults("supply").push_error(-222)
    # The SYST:ERR? reply form and the texts: SCPI-1999 vol. 2, 21.8 (from memory).
    assert inst.query("SYST:ERR?") == '-350,"Queue overflow"'
    assert inst.query("SYST:ERR?") == '-222,"Data out of range"'
    inst.close()


def test_clear_faults_and_parse_option(sim):
    sim.faults("dmm1").latency_s = 5.0
    sim.faults("dmm1").timeout_next = 4
    sim.clear_faults()
    assert idn_ok(sim, "dmm1")
    assert parse_fault_option("dmm1:latency=0.05") == ("dmm1", "latency", 0.05)
    with pytest.raises(ValueError):
        parse_fault_option("dmm1-latency")


def test_command_log_records_messages_and_replies():
    with SimBench(SimSettings(speed=SPEED, sites=1, parts=1, log_commands=True)) as bench:
        inst = open_resource(bench.resources["switch"])
        inst.write("ROUT:CLOS (@101)")
        assert inst.query("ROUT:CLOS? (@101)") == "1"
        inst.close()
        assert bench.state()["relays_closed"] == [101]
    records = [(r.role, r.message, r.reply) for r in bench.command_log]
    assert records == [("switch", "ROUT:CLOS (@101)", None), ("switch", "ROUT:CLOS? (@101)", "1")]

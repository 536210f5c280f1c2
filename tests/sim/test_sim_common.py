"""IEEE 488.2 common commands and SYSTem:ERRor on every simulated instrument, over pyvisa-py."""

from __future__ import annotations

import pytest

from sim_instruments.bench import SimBench, SimSettings
from sim_instruments.visa_client import close_all, open_all


@pytest.fixture(scope="module")
def bench():
    with SimBench(SimSettings(speed=20, sites=2, parts=4)) as sim:
        resources = open_all(sim)
        yield sim, resources
        close_all(resources)


ROLES = ["supply", "force", "dmm1", "dmm2", "switch", "handler"]


@pytest.mark.parametrize("role", ROLES)
def test_idn_names_simbench_and_four_fields(bench, role):
    sim, res = bench
    reply = res[role].query("*IDN?")
    fields = reply.split(",")
    assert len(fields) == 4  # IEEE 488.2 *IDN? (10.14, from memory): maker, model, serial, firmware
    assert fields[0] == "AMPSCREEN-SIM"
    assert reply == sim.identities()[role]


@pytest.mark.parametrize("role", ROLES)
def test_error_queue_status_and_clear(bench, role):
    _, res = bench
    inst = res[role]
    inst.write("*CLS")
    assert inst.query("*STB?") == "0"
    assert inst.query("SYST:ERR?") == '0,"No error"'
    inst.write("NOSUCH:HEADER 1")
    # STB bit 5 = event summary (IEEE 488.2, 11.2; from memory), bit 2 = error queue not empty
    # (SCPI-1999 vol. 1, status reporting; from memory)
    assert int(inst.query("*STB?")) & 0b100100 == 0b100100
    assert inst.query("SYST:ERR:COUN?") == "1"
    esr = int(inst.query("*ESR?"))
    assert esr & 32  # bit 5: command error (IEEE 488.2, 11.5.1; from memory)
    assert inst.query("*ESR?") == "0"  # cleared on read
    # Reply form and texts: SCPI-1999 vol. 2, 21.8 (from memory).
    assert inst.query("SYSTem:ERRor:NEXT?") == '-113,"Undefined header"'
    assert inst.query("SYST:ERR?") == '0,"No error"'
    inst.write("NOSUCH")
    inst.write("*CLS")
    assert inst.query("SYST:ERR:COUNt?") == "0"


@pytest.mark.parametrize("role", ROLES)
def test_opc_wai_rst(bench, role):
    _, res = bench
    inst = res[role]
    assert inst.query("*OPC?") == "1"
    inst.write("*WAI")
    inst.write("*RST")
    assert inst.query("*OPC?") == "1"
    assert inst.query("SYST:ERR?") == '0,"No error"'


def test_rst_restores_documented_defaults(bench):
    _, res = bench
    supply, dmm, force = res["supply"], res["dmm1"], res["force"]
    supply.write("INST:NSEL 1;:VOLT 3;:OUTP ON")
    dmm.write("VOLT:NPLC 10;RANG 1;:SAMP:COUN 5")
    force.write("VOLT 2;:OUTP ON")
    for inst in (supply, dmm, force):
        inst.write("*RST")
    assert float(supply.query("VOLT?")) == 0.0
    assert supply.query("OUTP?") == "0"
    assert float(dmm.query("VOLT:NPLC?")) == 1.0
    assert float(dmm.query("VOLT:RANG?")) == 10.0
    assert dmm.query("SAMP:COUN?") == "1"
    assert force.query("OUTP?") == "0" and float(force.query("VOLT?")) == 0.0

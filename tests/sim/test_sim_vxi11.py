"""The VXI-11 server against pyvisa-py's own VXI-11 client (an outside implementation of the
VXI-11 core channel over ONC RPC), reached without the portmapper through the
``host,PORT`` form pyvisa-py reads: identification, a 1 MiB binary block, device clear while
a reply is held back, the error queue and the status byte, a wrong device name."""

from __future__ import annotations

import time
from collections.abc import Iterator

import numpy as np
import pytest

pyvisa = pytest.importorskip("pyvisa")

from sim_instruments.bench import SimBench, SimSettings  # noqa: E402
from sim_instruments.dmm import BUFFER_READINGS  # noqa: E402


@pytest.fixture(scope="module")
def sim() -> Iterator[SimBench]:
    settings = SimSettings(seed=3, sites=1, parts=4, speed=1000.0, transport="vxi11")
    with SimBench(settings) as running:
        yield running


@pytest.fixture
def dmm(sim):
    sim.clear_faults()
    resource = pyvisa.ResourceManager("@py").open_resource(sim.resources["dmm1"], timeout=5000)
    resource.write("*RST;*CLS")
    yield resource
    sim.clear_faults()
    resource.close()


def test_identification_over_vxi11(dmm, sim):
    assert sim.resources["dmm1"].endswith("::inst0::INSTR")
    assert dmm.query("*IDN?").strip() == sim.instruments["dmm1"].idn()
    assert not dmm.get_visa_attribute(pyvisa.constants.ResourceAttribute.tcpip_is_hislip)


def test_one_mebibyte_binary_block(dmm):
    dmm.write(f"FORM REAL,64;:ZERO:AUTO OFF;:VOLT:NPLC 0.02;:SAMP:COUN {BUFFER_READINGS}")
    values = dmm.query_binary_values("READ?", datatype="d", is_big_endian=True, container=np.array)
    assert values.size == BUFFER_READINGS
    assert np.all((np.abs(values) < 1.0) | (values == 9.9e37))


def test_device_clear_while_a_reply_is_pending(dmm, sim):
    sim.faults("dmm1").latency_s = 5000.0      # model seconds: 5 s of wall time
    dmm.timeout = 300
    dmm.write("*IDN?")
    with pytest.raises(pyvisa.errors.VisaIOError) as caught:
        dmm.read_raw()
    assert caught.value.error_code == pyvisa.constants.StatusCode.error_timeout
    dmm.timeout = 5000
    dmm.clear()
    sim.faults("dmm1").latency_s = 0.0
    started = time.monotonic()
    assert dmm.query("SYST:ERR?").strip() == '0,"No error"'   # its own reply, not the held one
    assert time.monotonic() - started < 3.0


def test_error_queue_and_status_byte(dmm):
    dmm.write("FROB:NICATE")
    assert dmm.query("*OPC?").strip() == "1"
    assert dmm.read_stb() & 4                  # IEEE 488.2: error/event queue not empty
    # -113 Undefined header (SCPI-1999 standard error list).
    assert dmm.query("SYST:ERR?").strip() == '-113,"Undefined header"'
    assert not dmm.read_stb() & 4


def test_wrong_device_name_is_refused(sim):
    resource = sim.resources["dmm1"].replace("::inst0::", "::inst9::")
    # pyvisa-py raises a bare Exception naming the error of create_link (1: syntax error).
    with pytest.raises(Exception, match="error creating link: 1"):  # noqa: B017
        pyvisa.ResourceManager("@py").open_resource(resource, open_timeout=2000)

"""The HiSLIP server against pyvisa-py's own HiSLIP client (an outside implementation of
IVI-6.1): identification, a 1 MiB binary block, device clear while a reply is pending, the
error queue, the status byte, locks, and refusals of a wrong sub-address or a bad header."""

from __future__ import annotations

import socket
import struct
import time
from collections.abc import Iterator

import numpy as np
import pytest

pyvisa = pytest.importorskip("pyvisa")
hislip = pytest.importorskip("pyvisa_py.protocols.hislip")

from sim_instruments.bench import SimBench, SimSettings  # noqa: E402
from sim_instruments.dmm import BUFFER_READINGS  # noqa: E402


@pytest.fixture(scope="module")
def sim() -> Iterator[SimBench]:
    settings = SimSettings(seed=3, sites=1, parts=4, speed=1000.0, transport="hislip")
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


def _host_port(resource: str) -> tuple[str, int]:
    # TCPIP0::127.0.0.1::hislip0,PORT::INSTR (pyvisa-py reads the port after the comma)
    _, host, device, _ = resource.split("::")
    return host, int(device.split(",")[1])


def test_identification_over_hislip(dmm, sim):
    assert dmm.query("*IDN?").strip() == sim.instruments["dmm1"].idn()
    assert dmm.get_visa_attribute(pyvisa.constants.ResourceAttribute.tcpip_is_hislip)


def test_one_mebibyte_binary_block(dmm):
    # A buffered reading set in REAL,64: 131072 doubles, 1 MiB, more than one HiSLIP message
    # (pyvisa-py's client and our server both take 1 MiB messages, header included).
    dmm.write(f"FORM REAL,64;:ZERO:AUTO OFF;:VOLT:NPLC 0.02;:SAMP:COUN {BUFFER_READINGS}")
    values = dmm.query_binary_values("READ?", datatype="d", is_big_endian=True,
                                     container=np.array, chunk_size=1 << 20)
    assert values.size == BUFFER_READINGS == (1 << 20) // 8
    # Readings of an unpowered site: near 0 V or SCPI's overload 9.9E37, nothing else.
    assert np.all((np.abs(values) < 1.0) | (values == 9.9e37))
    dmm.write("FORM ASC")
    assert dmm.query("SYST:ERR?").strip() == '0,"No error"'


def test_device_clear_while_a_reply_is_pending(dmm, sim):
    # The reply is held back (latency): the client gives up, clears the device, and the next
    # query gets its own reply, never the abandoned one.
    dmm.write(f"FORM REAL,64;:ZERO:AUTO OFF;:VOLT:NPLC 0.02;:SAMP:COUN {BUFFER_READINGS}")
    sim.faults("dmm1").latency_s = 5000.0     # model seconds: 5 s of wall time
    dmm.timeout = 300
    dmm.write("READ?")
    with pytest.raises(pyvisa.errors.VisaIOError) as caught:
        dmm.read_raw()
    assert caught.value.error_code == pyvisa.constants.StatusCode.error_timeout
    dmm.timeout = 5000                          # the clear itself waits as long as any query
    started = time.monotonic()
    dmm.clear()
    sim.faults("dmm1").latency_s = 0.0
    assert time.monotonic() - started < 3.0     # the clear does not wait out the 5 s latency
    assert dmm.query("*IDN?").startswith("AMPSCREEN-SIM,")
    dmm.write("FORM ASC;:SAMP:COUN 1")


def test_error_queue_and_status_byte(dmm):
    dmm.write("FROB:NICATE")
    dmm.write("VOLT:NPLC 1000")
    assert dmm.query("*OPC?").strip() == "1"    # both messages have been run
    # IEEE 488.2 status byte bit 2 (error/event queue not empty), read over the async channel.
    assert dmm.read_stb() & 4
    # -113 Undefined header, -222 Data out of range (SCPI-1999 standard error list).
    assert dmm.query("SYST:ERR?").strip() == '-113,"Undefined header"'
    assert dmm.query("SYST:ERR?").strip() == '-222,"Data out of range"'
    assert dmm.query("SYST:ERR?").strip() == '0,"No error"'
    assert not dmm.read_stb() & 4


def test_lock_and_lock_info_with_the_protocol_client(sim):
    # pyvisa-py's resource API does not lock HiSLIP sessions; its protocol client does.
    host, port = _host_port(sim.resources["dmm1"])
    first = hislip.Instrument(host, port=port, timeout=2.0)
    second = hislip.Instrument(host, port=port, timeout=2.0)
    try:
        assert first.async_lock_info() == 0
        assert first.async_lock_request(timeout=0.1) == "success"
        assert second.async_lock_info() == 1
        assert second.async_lock_request(timeout=0.1) == "failure"
        assert first.async_lock_release() == "success"
        assert second.async_lock_request(timeout=0.1) == "success"
    finally:
        first.close()
        second.close()


def test_maximum_message_size_is_negotiated(sim):
    host, port = _host_port(sim.resources["dmm1"])
    client = hislip.Instrument(host, port=port, timeout=2.0)
    try:
        client.max_msg_size = 4096           # replies now come in 4 KiB messages
        client.send(b"*IDN?\n")
        assert client.receive(4096).startswith(b"AMPSCREEN-SIM,")
        assert client.max_msg_size == 1 << 20
    finally:
        client.close()


def test_wrong_sub_address_is_refused(sim):
    resource = sim.resources["dmm1"].replace("hislip0,", "hislip7,")
    with pytest.raises(pyvisa.errors.VisaIOError):
        pyvisa.ResourceManager("@py").open_resource(resource, open_timeout=2000)


def test_bad_header_gets_a_fatal_error(sim):
    host, port = _host_port(sim.resources["dmm1"])
    with socket.create_connection((host, port), timeout=2.0) as conn:
        conn.sendall(b"XX" + bytes(14))
        header = conn.recv(16)
    prologue, kind, control, _, _ = struct.unpack("!2sBBIQ", header)
    assert (prologue, hislip.MESSAGETYPE_STR[kind], control) == (b"HS", "FatalError", 1)

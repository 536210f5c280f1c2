"""SCPI number formatting and reply parsing (no instrument needed)."""

from __future__ import annotations

import math

import pytest

from drivers.errors import InstrumentTimeout, RequestRefused
from drivers.scpi_values import parse_error_entry, parse_scpi_bool, parse_scpi_float, scpi_number


def test_overload_is_infinite():
    # SCPI-1999 overload value 9.9E37 (docs/bench-commands.md; SCPI standard, from memory).
    assert parse_scpi_float("+9.90000000E+37") == math.inf
    assert parse_scpi_float("-9.9E37") == -math.inf
    assert parse_scpi_float("1.25E-6") == 1.25e-6


@pytest.mark.parametrize("text", ["", "abc", "1.0V", "nan"])
def test_non_numbers_are_refused(text):
    with pytest.raises(ValueError):
        parse_scpi_float(text)


def test_number_formatting_keeps_microvolts():
    assert float(scpi_number(9.999999)) == 9.999999
    assert scpi_number(-0.0) == "0"
    with pytest.raises(ValueError):
        scpi_number(math.inf)


def test_bools_and_error_entries():
    assert parse_scpi_bool("1") and not parse_scpi_bool("OFF")
    with pytest.raises(ValueError):
        parse_scpi_bool("2")
    # SCPI standard error text for -113 (SCPI-1999 vol. 2, 21.8, from memory;
    # docs/bench-commands.md).
    assert parse_error_entry('-113,"Undefined header"') == (-113, "Undefined header")
    assert parse_error_entry('0,"No error"') == (0, "No error")


def test_error_messages_are_one_line():
    error = InstrumentTimeout("dmm1", "TCPIP0::127.0.0.1::5025::SOCKET", "READ?", "timed out after 5.0 s")
    assert str(error) == "dmm1 (TCPIP0::127.0.0.1::5025::SOCKET): 'READ?' timed out after 5.0 s"
    refused = RequestRefused("supply", "V+", "20 V", "-12 V to 12 V", "bench safety limit")
    assert str(refused) == "supply: refused V+ = 20 V: allowed -12 V to 12 V (bench safety limit)"


def test_terminations_per_transport():
    from drivers.scpi_link import terminations

    # Raw sockets and serial lines carry bytes only: the newline is the only end of a reply.
    assert terminations("TCPIP0::10.0.0.5::5025::SOCKET") == ("\n", "\n")
    assert terminations("ASRL/dev/ttyUSB0::INSTR") == ("\n", "\n")
    # INSTR sessions end a message with END (HiSLIP DataEnd, VXI-11 END, USBTMC EOM, GPIB EOI).
    for resource in ("TCPIP0::10.0.0.5::hislip0,4880::INSTR", "TCPIP0::10.0.0.5::inst0::INSTR",
                     "USB0::0x1234::0x5678::SN1::INSTR", "GPIB0::22::INSTR"):
        assert terminations(resource) == ("\n", None)


def test_hislip_bench_config_uses_instr_resources():
    from pyvisa.rname import parse_resource_name

    from sim_instruments.bench import SimBench, SimSettings
    from station.config.bench_config import parse_bench_config

    settings = SimSettings(sites=1, transport="socket", transports={"dmm1": "hislip"})
    with SimBench(settings) as sim:
        config = parse_bench_config(sim.bench_config_text())
    dmm = config.instruments["dmm1"].resource
    assert dmm.endswith("::INSTR") and "::hislip0," in dmm
    assert config.instruments["supply"].resource.endswith("::SOCKET")
    # pyvisa's own parser reads it as a TCPIP INSTR resource whose device name holds the port.
    parsed = parse_resource_name(dmm)
    assert parsed.lan_device_name.startswith("hislip0,")

"""The SCPI parser of the simulated instruments, exercised through real pyvisa-py sockets."""

from __future__ import annotations

import pytest

from sim_instruments.bench import SimBench, SimSettings
from sim_instruments.scpi_errors import ScpiError
from sim_instruments.scpi_params import ChannelList, Numeric, number, tokenize
from sim_instruments.scpi_tree import pattern_keywords
from sim_instruments.visa_client import close_all, open_all


@pytest.fixture(scope="module")
def res():
    with SimBench(SimSettings(speed=20, sites=4, parts=4)) as sim:
        resources = open_all(sim)
        yield resources
        close_all(resources)


@pytest.fixture
def supply(res):
    inst = res["supply"]
    inst.write("*RST;*CLS")
    return inst


def errors(inst) -> list[int]:
    codes = []
    while True:
        code = int(inst.query("SYST:ERR?").split(",")[0])
        if code == 0:
            return codes
        codes.append(code)


def test_pattern_keywords_mark_optional_nodes():
    assert pattern_keywords("[SOURce:]VOLTage[:LEVel]") == [
        ("SOURce", True), ("VOLTage", False), ("LEVel", True)]


@pytest.mark.parametrize("command", [
    "VOLT 1.5", "VOLTAGE 1.5", "volt 1.5", "VoLtAgE:LeV 1.5", "SOUR:VOLT 1.5",
    "SOURCE:VOLTAGE:LEVEL:IMMEDIATE:AMPLITUDE 1.5", ":SOUR:VOLT:IMM 1.5", "VOLT:AMPL 1.5",
    "VOLT 1500 mV", "VOLT 1.5V", "VOLT 0.0015KV",
])
def test_short_long_case_optional_and_suffix_forms(supply, command):
    supply.write(command)
    assert float(supply.query("SOURce:VOLTage?")) == pytest.approx(1.5)
    assert errors(supply) == []


def test_compound_message_relative_path(supply):
    # "CURR" resolves from the SOURce subsystem of the previous "VOLT" (SCPI-1999 vol. 1, 6.2.4;
    # from memory)
    supply.write("VOLT 2;CURR 0.03")
    assert supply.query("VOLT?;CURR?") == "+2.00000000E+00;+3.00000000E-02"
    # a common command in between leaves the path alone
    supply.write("VOLT 3;*CLS;CURR 0.04")
    assert float(supply.query("CURR?")) == pytest.approx(0.04)
    assert errors(supply) == []
    # relative to INSTrument, VOLT is unknown; with a leading ':' it is found from the root
    supply.write("INST:NSEL 2;VOLT -1")
    assert errors(supply) == [-113]
    supply.write("INST:NSEL 2;:VOLT -1")
    assert float(supply.query("VOLT?")) == -1.0
    assert supply.query("INST:NSEL?") == "2"


def test_compound_queries_join_replies(res):
    dmm = res["dmm1"]
    dmm.write("*RST")
    assert dmm.query("VOLT:NPLC?;RANG?;:SAMP:COUN?") == "+1.00000000E+00;+1.00000000E+01;1"


@pytest.mark.parametrize(("command", "code"), [
    ("VOLTS 1", -113),          # unknown header
    ("VOLT", -109),             # missing parameter
    ("VOLT 1,2", -108),         # one parameter too many
    ("VOLT ON", -104),          # character data where a number belongs
    ("VOLT 20", -222),          # beyond the +-15 V of the channel
    ("CURR 1 uA", -222),        # below the 100 uA compliance minimum
    ("VOLT (1", -102),          # syntax
    ("VOLT 1 XYZ", -131),       # suffix that is no volt
    ("OUTP MAYBE", -104),
])
def test_errors_have_standard_codes(supply, command, code):
    # The codes and their meanings: SCPI-1999 vol. 2, 21.8 (SYSTem:ERRor, the error list);
    # from memory. The +-15 V and 100 uA ranges are the simulated supply's own.
    supply.write(command)
    assert errors(supply) == [code]


def test_error_aborts_rest_of_message_only_for_command_errors(supply):
    supply.write("VOLT 99;CURR 0.05")  # execution error: CURR still runs
    assert errors(supply) == [-222]
    assert float(supply.query("CURR?")) == pytest.approx(0.05)
    supply.write("BOGUS;CURR 0.06")    # command error: the rest of the message is skipped
    assert errors(supply) == [-113]
    assert float(supply.query("CURR?")) == pytest.approx(0.05)


def test_min_max_def_and_boolean_forms(supply):
    supply.write("VOLT MAX")
    assert float(supply.query("VOLT?")) == 15.0
    supply.write("VOLT MIN")
    assert float(supply.query("VOLT?")) == -15.0
    supply.write("CURR 20MA")  # MA is milliampere (SCPI-1999 vol. 1, 7.7.3; from memory)
    assert float(supply.query("CURR?")) == pytest.approx(0.020)
    for text, state in (("ON", "1"), ("0", "0"), ("1", "1"), ("off", "0")):
        supply.write(f"OUTP {text}")
        assert supply.query("OUTP:STAT?") == state
    assert errors(supply) == []


def test_queue_overflow_keeps_sixteen_and_reports_350(supply):
    for _ in range(20):
        supply.write("NOPE")
    # The depth (16) is the simulator's choice; on overflow the last entry becomes -350 "Queue
    # overflow" (SCPI-1999 vol. 2, 21.8; from memory).
    assert supply.query("SYST:ERR:COUN?") == "16"
    codes = errors(supply)
    assert codes == [-113] * 15 + [-350]


def test_channel_lists_and_ranges(res):
    switch = res["switch"]
    switch.write("*RST;*CLS")
    switch.write("ROUT:CLOS (@101:103,301)")
    assert switch.query("ROUT:CLOS? (@101,102,103,104,301)") == "1,1,1,0,1"
    switch.write("ROUTe:OPEN (@102)")
    assert switch.query("ROUT:CLOS? (@101:104)") == "1,0,1,0"
    switch.write("ROUT:OPEN:ALL")
    assert switch.query("ROUT:CLOS? (@101:104)") == "0,0,0,0"
    switch.write("ROUT:CLOS (@105)")  # no site 5 on a 4-site fixture
    switch.write("ROUT:CLOS (@201,202)")  # two scanner relays at once
    assert errors(switch) == [-222, -221]  # "Data out of range", "Settings conflict" (as above)
    assert switch.query("ROUT:CLOS? (@201,202)") == "0,0"


def test_tokenizer_units_and_lists():
    assert tokenize("100 mV") == [Numeric(100.0, "MV")]
    assert tokenize("(@101:103,201)") == [ChannelList((101, 102, 103, 201))]
    assert number("V")(tokenize("100 mV")[0]) == pytest.approx(0.1)
    assert number("A")(tokenize("20MA")[0]) == pytest.approx(0.02)
    with pytest.raises(ScpiError) as info:
        number("V", 0, 1)(tokenize("2")[0])
    assert info.value.code == -222

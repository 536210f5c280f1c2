"""Property: every simulated instrument's SCPI parser (sim_instruments/scpi_tree.py) answers
any message with a reply line or a queued error (or silently applies a valid command), and
never crashes; the error queue stays within its depth (16, plus the -350 overflow entry).

Messages: arbitrary text, and text built from SCPI pieces (keywords of the command set in
docs/bench-commands.md, numbers with suffixes, channel lists, separators), which gets past
the first keyword. Tool: hypothesis.
"""

from __future__ import annotations

from hypothesis import HealthCheck, given, settings
from hypothesis import strategies as st

from sim_instruments.bench import SimBench, SimSettings

# Not started: the instruments are used directly, no sockets. Speed 1000 keeps the model's
# waits (integration, handler index) short.
BENCH = SimBench(SimSettings(seed=9, sites=4, parts=8, speed=1000.0))
ROLES = sorted(BENCH.instruments)
QUEUE_DEPTH = 16

PIECES = ["*IDN?", "*RST", "*CLS", "*OPC?", "*ESR?", "*STB?", "*WAI", "SYST:ERR?", "SYSTem:ERRor:COUNt?",
          "INST:NSEL", "INSTrument:SELect", "VOLT", "VOLTage?", "CURR", "OUTP", "OUTPut?", "MEAS:VOLT?",
          "MEAS:CURR?", "CONF:VOLT:DC", "VOLT:DC:NPLC", "SENS:VOLT:DC:RANG", "RANG:AUTO", "ZERO:AUTO",
          "SAMP:COUN", "SYST:LFR", "READ?", "INIT", "FETC?", "ROUT:CLOS", "ROUT:OPEN", "ROUT:CLOS?",
          "ROUT:OPEN:ALL", "HAND:SIT?", "HAND:NEXT?", "HAND:IND?", "HAND:BIN", "HAND:RES", "HAND:COUN?",
          "HAND:BIN:COUN?", "SIM:FAUL:CLE", "SIM:FAUL:ERR", ":", ";", ";:", ",", " ", "?", "(@101)",
          "(@101:104)", "(@201,202)", "1", "2", "-5", "0.02", "100", "1e99", "-1e-3", "5 V", "10 mV",
          "20 MA", "ON", "OFF", "ONCE", "MAX", "#", '"x"', "\t", "\x00", "é"]
scpi_like = st.lists(st.sampled_from(PIECES), min_size=1, max_size=8).map(" ".join)
messages = st.one_of(st.text(max_size=60), scpi_like)


@settings(max_examples=400, deadline=None, suppress_health_check=[HealthCheck.too_slow])
@given(role=st.sampled_from(ROLES), message=messages)
def test_any_message_gets_a_reply_or_an_error_never_a_crash(role, message):
    instrument = BENCH.instruments[role]
    queued_before = len(instrument.errors)
    reply = instrument.process(message)
    assert reply is None or (isinstance(reply, str) and "\n" not in reply)
    assert len(instrument.errors) <= QUEUE_DEPTH + 1
    if reply is None and message.strip() and not message.strip()[0].isalpha() and message.strip()[0] not in "*:;":
        assert len(instrument.errors) > queued_before or len(instrument.errors) == QUEUE_DEPTH + 1
    if len(instrument.errors) > QUEUE_DEPTH // 2:
        instrument.process("*CLS")

"""The retry policy against the simulated bench's injected faults, through real sockets.

Bounded retries of harmless resends (queries, settings sent whole), reconnecting after a
drop; HANDler:NEXT? is never resent blindly (no part skipped or presented twice); a lost
SYST:ERR? reply is never taken for an empty queue.
"""

from __future__ import annotations

import time
from collections.abc import Iterator

import pytest

from drivers.errors import InstrumentBadReply, InstrumentReportedError, InstrumentTimeout
from drivers.handler import ScpiHandler
from drivers.retry import RetryPolicy
from sim_instruments.bench import SimBench, SimSettings
from station.config.bench_config import parse_bench_config
from station.lot.bench import Bench, open_bench

TIMEOUT_S = 0.3


@pytest.fixture(scope="module")
def sim() -> Iterator[SimBench]:
    with SimBench(SimSettings(seed=2, sites=2, parts=12, speed=20.0)) as running:
        yield running


@pytest.fixture
def bench(sim) -> Iterator[Bench]:
    sim.clear_faults()
    opened = open_bench(parse_bench_config(sim.bench_config_text()))
    for link in opened.all_links().values():
        link.timeout_s = TIMEOUT_S
        link.retry = RetryPolicy(attempts=3, pause_s=0.01)
    yield opened
    sim.clear_faults()
    opened.safe_state()
    opened.close()


def test_a_swallowed_reply_is_asked_again(bench, sim):
    bench.force.set_level(1.25)
    sim.faults("force").timeout_next = 2
    assert bench.force.level() == 1.25
    assert bench.force.link.retries == 2


def test_garbled_replies_are_asked_again_and_never_taken_for_a_value(bench, sim):
    bench.supply.set_rails(4.0, -4.0)
    for _ in range(5):                      # the sim garbles in three ways; try several
        sim.faults("supply").garbage_next = 2
        assert bench.supply.rails() == (4.0, -4.0)
    assert bench.supply.link.retries == 10


def test_a_dropped_connection_is_reopened_and_the_setting_sent_whole(bench, sim):
    sim.faults("force").drop_after = 0      # closes before the next message
    bench.force.set_level(-2.5)
    assert sim.state()["force"]["level_v"] == -2.5
    assert bench.force.link.reconnects >= 1


def test_retries_are_bounded(bench, sim):
    link = bench.force.link
    sim.faults("force").timeout_next = 50
    sent = link.transactions
    with pytest.raises(InstrumentTimeout):
        link.query("VOLT?")
    assert link.transactions - sent == 3     # three tries, then the timeout is raised
    sim.faults("force").clear()
    sim.faults("force").timeout_next = 0


def test_dmm_fetch_falls_back_to_a_fresh_reading(bench, sim):
    dmm = bench.dmms[0]
    dmm.configure(nplc=1, range_v=10.0, autozero=False)
    dmm.start()
    sim.faults("dmm1").timeout_next = 1     # the FETCh? reply is lost
    values = dmm.fetch()
    assert len(values) == 1 and dmm.link.retries >= 1


def test_a_lost_error_queue_reply_is_not_a_clean_queue(bench, sim):
    sim.faults("switch").push_error(-222)
    sim.faults("switch").timeout_next = 1   # the SYST:ERR? that carried -222 is lost
    with pytest.raises(InstrumentBadReply, match="error entry may be lost"):
        bench.switch.link.check_errors()


def test_error_read_that_was_never_sent_is_read_again(bench, sim):
    link = bench.switch.link
    sim.faults("switch").push_error(-222)
    sim.faults("switch").drop_after = 1     # the next message is served, then the link closes
    assert link.query("*OPC?") == "1"
    time.sleep(0.1)                         # the close reaches our socket
    with pytest.raises(InstrumentReportedError) as caught:
        link.check_errors()                 # found closed before sending: reconnect, read
    assert caught.value.codes == [-222] and link.reconnects >= 1


@pytest.mark.parametrize("kind", ["timeout", "garbage", "drop"])
def test_handler_next_is_never_sent_twice_blindly(sim, kind):
    # A fresh lot: every NEXT? of it faulted; the ids must still come once each, in order.
    with SimBench(SimSettings(seed=4, sites=2, parts=7, speed=20.0)) as lot:
        bench = open_bench(parse_bench_config(lot.bench_config_text()))
        try:
            handler = bench.handler
            assert isinstance(handler, ScpiHandler)
            handler.link.timeout_s = TIMEOUT_S
            handler.sites()
            seen: list[str] = []
            while True:
                faults = lot.faults("handler")
                if kind == "timeout":
                    faults.timeout_next = 1
                elif kind == "garbage":
                    faults.garbage_next = 1
                else:
                    faults.drop_after = 0
                ids = handler.next_index()
                if ids is None:
                    break
                for site, pid in enumerate(ids, start=1):
                    if pid:
                        seen.append(pid)
                        handler.assign_bin(site, 1)
            assert seen == [p.part_id for p in lot.truth()]
        finally:
            lot.clear_faults()
            bench.safe_state()
            bench.close()


class _FakeLink:
    role, resource = "handler", "FAKE::1"

    def __init__(self, reply: str) -> None:
        self.reply = reply

    def query(self, command: str, timeout_s=None, retry=True) -> str:
        return self.reply

    def query_float(self, command: str, timeout_s=None, retry=True) -> float:
        return 2.0


@pytest.mark.parametrize("reply", ["D00001,D0?0%$", "D00001", "D1,D2,D3", "#@!?%&QXZ~,-", "D00001,"])
def test_handler_reply_that_is_not_ids_is_refused(reply):
    handler = ScpiHandler(_FakeLink(reply))  # type: ignore[arg-type]
    with pytest.raises(InstrumentBadReply, match="expected 2 part ids"):
        handler._parse(reply, "HAND:NEXT?")

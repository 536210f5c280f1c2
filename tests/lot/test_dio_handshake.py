"""The handler wired through a digital I/O instrument: the same lot gives the same parts in
the same sites and the same bins as with the command-protocol handler; the handshake keeps the
bench config's timing (the simulated handler counts every breach); a handler that never says
start-of-test stops the wait after the configured timeout."""

from __future__ import annotations

import time

import pandas as pd
import pytest
from click.testing import CliRunner

from drivers.dio_handler import DioHandshakeHandler, HandshakeTiming
from drivers.errors import InstrumentTimeout
from drivers.scpi_link import ScpiLink
from station.cli.main import main
from station.config.bench_config import parse_bench_config
from station.lot.bench import open_bench

sim_bench = pytest.importorskip("sim_instruments.bench")

# Seed 2's 16 parts hold an open (D00015) that a re-seat does not fix: the contact test's
# retest pulses the re-seat line too.
SEED, PARTS = 2, 16


def _dry_run(tmp_path, interface: str) -> tuple[pd.DataFrame, pd.DataFrame]:
    out = tmp_path / interface
    result = CliRunner().invoke(main, ["dry-run", "--parts", str(PARTS), "--sites", "4", "--seed", str(SEED),
                                       "--speed", "10", "--out", str(out), "--lot", "HS-1",
                                       "--handler", interface])
    assert result.exit_code == 0, result.output
    return pd.read_csv(out / "parts.csv"), pd.read_csv(out / "sim_truth.csv")


def test_same_lot_same_bins_as_the_command_handler(tmp_path):
    scpi_parts, scpi_truth = _dry_run(tmp_path, "scpi")
    dio_parts, dio_truth = _dry_run(tmp_path, "dio")
    columns = ["PART_ID", "SITE_NUM", "HARD_BIN", "SOFT_BIN", "RETEST"]
    assert len(dio_parts) == PARTS
    pd.testing.assert_frame_equal(scpi_parts[columns], dio_parts[columns])
    # What the simulated handler itself sorted each part to, both ways.
    truth = ["PART_ID", "BINNED_HARD_BIN", "SITE"]
    pd.testing.assert_frame_equal(scpi_truth[truth], dio_truth[truth])
    assert dio_truth.set_index("PART_ID").loc["D00015", "DEFECT"] == "open"


def _wired(tmp_path, **settings):
    chosen = {"seed": SEED, "sites": 2, "parts": 6, "speed": 10.0, "handler_interface": "dio", **settings}
    return sim_bench.SimBench(sim_bench.SimSettings(**chosen))


def test_the_bench_config_timing_is_kept(tmp_path):
    with _wired(tmp_path) as sim:
        with open_bench(parse_bench_config(sim.bench_config_text())) as bench:
            handler = bench.handler
            assert isinstance(handler, DioHandshakeHandler)
            assert handler.timing == HandshakeTiming(2e-3, 1e-3, 10.0, "D")
            while (ids := handler.next_index()) is not None:
                for site, part in enumerate(ids, start=1):
                    if part:
                        handler.assign_bin(site, 10 + site)
        assert sim.wired_handler.violations == []
        assert [p.binned_hard_bin for p in sim.parts] == [11, 12] * 3


def test_a_strobe_too_short_and_too_early_is_a_breach(tmp_path):
    # Model time at a tenth of wall time: a write's round trip (well under 1 ms) is then
    # far shorter than the handler's minimums of 0.5 ms settle and 1 ms strobe.
    with _wired(tmp_path, speed=0.1, handler_index_s=0.01) as sim:
        link = ScpiLink("handler", sim.resources["handler"])
        link.open()
        try:
            handler = DioHandshakeHandler(link, 2, HandshakeTiming(0.0, 0.0, 10.0))
            ids = handler.next_index()
            assert ids == ["P00001", "P00002"]
            handler.assign_bin(1, 1)
            handler.assign_bin(2, 1)
            handler.next_index()
        finally:
            link.close()
        breaches = sim.wired_handler.violations
        assert any("after the bin lines changed" in b for b in breaches)
        assert any("strobe" in b for b in breaches)


def test_no_start_of_test_times_out(tmp_path):
    # An index of 100 model seconds (10 s of wall time) against a 0.3 s start timeout.
    with _wired(tmp_path, handler_index_s=100.0) as sim:
        link = ScpiLink("handler", sim.resources["handler"])
        link.open()
        try:
            handler = DioHandshakeHandler(link, 2, HandshakeTiming(2e-3, 1e-3, 0.3))
            started = time.monotonic()
            with pytest.raises(InstrumentTimeout, match="handshake.start_timeout"):
                handler.next_index()
            assert time.monotonic() - started < 2.0
        finally:
            link.close()


def test_dio_handshake_needs_its_timing():
    text = """
instruments:
  supply: {resource: "TCPIP0::127.0.0.1::5025::SOCKET", driver: scpi-dual-supply}
  force: {resource: "TCPIP0::127.0.0.1::5026::SOCKET", driver: scpi-force-source}
  dmm: [{resource: "TCPIP0::127.0.0.1::5027::SOCKET", driver: scpi-dmm}]
  switch: {resource: "TCPIP0::127.0.0.1::5028::SOCKET", driver: scpi-fixture-switch}
  handler: {resource: "TCPIP0::127.0.0.1::5029::SOCKET", driver: dio-handshake}
fixture: {rf: 100 kOhm, rs: 100 Ohm, sites: 1, line_frequency: 50 Hz}
safety: {max_rail: 12 V, current_compliance: 20 mA}
"""
    from station.config.files import ConfigError

    with pytest.raises(ConfigError, match="handshake section"):
        parse_bench_config(text, "bench.yaml")

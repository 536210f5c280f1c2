"""Settling math (closed-form window averages) and concurrent DMM integration."""

from __future__ import annotations

import threading
import time

import pytest
from scipy.integrate import quad

from sim_instruments.bench import SimBench, SimSettings
from sim_instruments.model import settle_time_to, vos_true
from sim_instruments.population import make_part
from sim_instruments.serve import serve_until_interrupted
from sim_instruments.settling import NodeHistory
from sim_instruments.visa_client import close_all, open_all


def test_window_mean_matches_numerical_integration():
    node = NodeHistory(14.5)
    node.change(0.010, 0.002, 0.012, extra=((1e-3, 0.03), (-1e-3, 0.0025)), tau=0.0025)
    node.change(0.030, 0.004, 0.031, tau=0.0025)  # a second change before the first settled
    for a, b in ((0.0, 0.05), (0.011, 0.013), (0.029, 0.2)):
        reference = quad(node.value, a, b, points=[0.010, 0.012, 0.030, 0.031], limit=200)[0]
        assert node.mean(a, b) == pytest.approx(reference / (b - a), rel=1e-7)  # scipy reference
    assert node.value(10.0) == pytest.approx(0.004, abs=1e-12)


def test_settle_time_bounds_the_transient():
    part = make_part(1, 0)
    t = settle_time_to(1e-9, 15e-3, part, rail_step_v=5.0)
    node = NodeHistory(15e-3)
    amp = part.thermal_v_per_v * 5.0
    node.change(0.0, 0.0, 0.0, extra=((amp, part.tau_slow_s), (-amp, part.tau_fast_s)),
                tau=part.tau_fast_s)
    assert abs(node.value(t)) <= 1e-9 < abs(node.value(0.5 * t))


def test_dmms_integrate_concurrently():
    with SimBench(SimSettings(speed=1.0, sites=4, parts=4)) as sim:
        res = open_all(sim)
        dmms = [res[f"dmm{k}"] for k in range(1, 5)]
        for dmm in dmms:
            # 10 NPLC at 50 Hz: 200 ms each (N/50 s; common practice, no source)
            dmm.write("ZERO:AUTO OFF;:VOLT:NPLC 10;:SAMP:COUN 1")
            dmm.query("*OPC?")
        start = time.perf_counter()
        for dmm in dmms:
            dmm.write("INIT")
        replies = [dmm.query("FETCh?") for dmm in dmms]
        elapsed = time.perf_counter() - start
        close_all(res)
    assert len(replies) == 4
    assert 0.19 <= elapsed < 0.55  # one integration time, not four (0.8 s)


def test_aol_from_the_force_step():
    with SimBench(SimSettings(speed=20, sites=1, parts=1, defects=False)) as sim:
        res = open_all(sim)
        res["handler"].query("HANDler:NEXT?")
        res["supply"].write("INST:NSEL 1;:VOLT 5;:OUTP ON;:INST:NSEL 2;:VOLT -5;:OUTP ON")
        res["switch"].write("ROUT:CLOS (@101)")
        res["force"].write("OUTP ON")
        dmm = res["dmm1"]
        dmm.write("ZERO:AUTO OFF;:VOLT:NPLC 10;RANG 1;:SAMP:COUN 10")
        vos = {}
        for level in (-4.0, 4.0):
            res["force"].write(f"VOLT {level}")
            time.sleep(0.5 / 20)
            values = [float(v) for v in dmm.query("READ?").split(",")]
            vos[level] = sum(values) / len(values) / 1001.0
        part = sim.truth()[0]
        close_all(res)
    # AOL = dVout / dVos (MIL-STD-883 TM 4004, method number from memory; docs/methods.md "gain").
    aol = 8.0 / (vos[4.0] - vos[-4.0])
    assert aol == pytest.approx(part.aol_vv, rel=0.05)
    assert vos[4.0] == pytest.approx(vos_true(part, 0.0, 10.0, 4.0), abs=20e-9)


def test_serve_until_interrupted_echoes_and_writes(tmp_path):
    lines: list[str] = []
    stop = threading.Event()
    bench_file, truth_file = tmp_path / "bench.yaml", tmp_path / "sim_truth.csv"
    thread = threading.Thread(target=serve_until_interrupted, kwargs=dict(
        settings=SimSettings(sites=2, parts=3), write_bench=bench_file, echo=lines.append,
        truth_path=truth_file, stop_event=stop))
    thread.start()
    deadline = time.time() + 5
    while not bench_file.exists() and time.time() < deadline:
        time.sleep(0.02)
    stop.set()
    thread.join(5)
    assert not thread.is_alive()
    assert [line.split()[0] for line in lines] == ["supply", "force", "dmm1", "dmm2", "switch",
                                                   "handler"]
    assert all(line.split()[1].startswith("TCPIP0::127.0.0.1::") for line in lines)
    assert "driver: scpi-dmm" in bench_file.read_text()
    assert len(truth_file.read_text().splitlines()) == 4

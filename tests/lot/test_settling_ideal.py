"""The ideal simulated bench (SimSettings.ideal): no settling transients, no integration wait."""

from __future__ import annotations

import pytest

from sim_instruments.bench import SimBench, SimSettings
from sim_instruments.model import vos_true
from sim_instruments.visa_client import close_all, open_all


def _first_reading_after_power_up(ideal: bool) -> tuple[float, float, float]:
    """(reading, true node value, model seconds the READ? took) right after powering a part."""
    settings = SimSettings(seed=3, sites=1, parts=1, defects=False, ideal=ideal, handler_index_s=0.0)
    sim = SimBench(settings)
    assert sim.model.ideal is ideal  # the setting reaches the model
    with sim:
        res = open_all(sim)
        try:
            res["handler"].query("HAND:NEXT?")
            res["supply"].query("INST:NSEL 1;:VOLT 5;:OUTP ON;:INST:NSEL 2;:VOLT -5;:OUTP ON;*OPC?")
            res["switch"].query("ROUT:CLOS (@101);*OPC?")
            res["dmm1"].query("CONF:VOLT:DC 1;:VOLT:DC:NPLC 10;:ZERO:AUTO OFF;*OPC?")
            before = sim.clock.now()
            reading = float(res["dmm1"].query("READ?"))
            took = sim.clock.now() - before
        finally:
            close_all(res)
        part = sim.truth()[0]
    return reading, sim.model.fixture.gain * vos_true(part, 0.0, 10.0), took


def test_ideal_bench_reads_the_settled_value_at_once():
    reading, truth, took = _first_reading_after_power_up(ideal=True)
    # 10 NPLC at 50 Hz would integrate 0.2 s (N/50 s; common practice, no source); the ideal
    # bench answers without waiting.
    assert took < 0.1
    # No transient: the reading is the settled node within the noise (~30 nV RTI at 10 NPLC,
    # the simulator's invented noise model, sim_instruments/model.py).
    assert reading == pytest.approx(truth, abs=1001 * 0.3e-6)


def test_real_bench_shows_the_transient_and_the_integration():
    reading, truth, took = _first_reading_after_power_up(ideal=False)
    assert took >= 0.2
    assert abs(reading - truth) > 1001 * 1e-6  # read straight after power-up: still settling

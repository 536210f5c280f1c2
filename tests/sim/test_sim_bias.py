"""Bias currents in the simulator: the Rb shunt relays, the offset they add, Rb's noise and the
RC settling, measured the way the station measures them (pyvisa-py over the sockets)."""

from __future__ import annotations

import math
import time

import numpy as np
import pytest
from scipy import constants

from sim_instruments.bench import SimBench, SimSettings
from sim_instruments.model import (
    BIAS_TAIL_S,
    FIXTURE_CAPACITANCE_F,
    bias_offset_rti,
    johnson_density,
    part_noise_rti,
)
from sim_instruments.population import LEAKY_SHARE, make_population, truth_row
from sim_instruments.visa_client import close_all, open_all

GAIN = 1001.0
RB = 100e6
SPEED = 20


def test_johnson_noise_of_10_megohm_at_300_kelvin():
    # sqrt(4kTR), k from scipy.constants (CODATA): 407 nV/rtHz (common practice, no source)
    expected = math.sqrt(4 * constants.k * 300.0 * 10e6)
    assert johnson_density(10e6, 300.0) == pytest.approx(expected, rel=1e-9)
    assert johnson_density(10e6, 300.0) == pytest.approx(407e-9, abs=0.5e-9)


def test_100_pA_through_10_megohm_is_1_mV():
    # common practice, no source: V = I R
    part = make_population(1, 1)[0]
    part.ib_plus_a, part.ib_minus_a = 100e-12, 0.0
    assert bias_offset_rti(part, 10e6, 0.0) == pytest.approx(1e-3, rel=1e-12)
    part.ib_plus_a, part.ib_minus_a = 0.0, 100e-12
    assert bias_offset_rti(part, 0.0, 10e6) == pytest.approx(-1e-3, rel=1e-12)


def test_rb_noise_adds_in_quadrature():
    part = make_population(1, 1)[0]
    t = 0.02
    without = part_noise_rti(part, t)
    with_rb = part_noise_rti(part, t, rb_in_ohm=RB)
    assert with_rb ** 2 - without ** 2 == pytest.approx(johnson_density(RB) ** 2 / (2 * t), rel=1e-9)


def test_population_bias_currents_are_a_few_pA_with_a_few_leaky_parts():
    parts = make_population(7, 2000)
    normal = [p for p in parts if not p.leaky]
    median = float(np.median([p.ib_plus_a for p in normal]))
    assert 0.5e-12 < median < 5e-12
    share = sum(p.leaky for p in parts) / len(parts)
    assert share == pytest.approx(LEAKY_SHARE, abs=0.008)
    leaky = [p for p in parts if p.leaky]
    assert all(max(abs(p.ib_plus_a), abs(p.ib_minus_a)) > 15e-12 for p in leaky)
    row = truth_row(parts[0])
    assert row["IOS_A"] == parts[0].ib_plus_a - parts[0].ib_minus_a


def test_earlier_parameters_of_a_seed_did_not_move():
    # the bias currents are drawn last: seed 1 part D00019 is still the offset outlier
    part = make_population(1, 19)[18]
    assert part.defect == "outlier"


def _read(dmm, count=10, nplc=10) -> float:
    dmm.write(f"ZERO:AUTO OFF;:VOLT:NPLC {nplc};RANG 10;:SAMP:COUN {count}")
    return float(np.mean([float(v) for v in dmm.query("READ?").split(",")]))


@pytest.fixture
def powered_site():
    with SimBench(SimSettings(speed=SPEED, defects=False, handler_index_s=0.01, sites=1)) as sim:
        res = open_all(sim)
        part_id = res["handler"].query("HANDler:NEXT?").split(",")[0]
        part = next(p for p in sim.truth() if p.part_id == part_id)
        res["supply"].write("INST:NSEL 1;:VOLT 5;:OUTP ON")
        res["supply"].write("INST:NSEL 2;:VOLT -5;:OUTP ON")
        res["switch"].write("ROUT:CLOS (@101)")
        time.sleep(1.0 / SPEED)
        yield sim, res, part
        close_all(res)


def test_opening_each_shunt_adds_that_inputs_current_times_rb(powered_site):
    sim, res, part = powered_site
    dmm, switch = res["dmm1"], res["switch"]
    base = _read(dmm)
    readings = {}
    for name, channels in (("plus", "501"), ("minus", "601"), ("both", "501,601")):
        switch.write(f"ROUT:CLOS (@{channels})")
        time.sleep(0.6 / SPEED)  # ten tail time constants of model time
        readings[name] = _read(dmm) - base
        switch.write("ROUT:OPEN (@501,601)")
        time.sleep(0.6 / SPEED)
    # noise of 10 readings of 0.2 s with 1 or 2 Rb of 100 MOhm: well under 1 uV RTI
    assert readings["plus"] / GAIN == pytest.approx(part.ib_plus_a * RB, abs=1.5e-6)
    assert readings["minus"] / GAIN == pytest.approx(-part.ib_minus_a * RB, abs=1.5e-6)
    assert readings["both"] / GAIN == pytest.approx((part.ib_plus_a - part.ib_minus_a) * RB, abs=2e-6)
    assert switch.query("ROUT:CLOS? (@501,601)") == "0,0"


def test_bias_step_settles_with_rb_c_and_a_slow_tail(powered_site):
    sim, res, part = powered_site
    part_after = sim.model.seated[0]
    assert part_after is not None
    part_after.ib_plus_a = 50e-12  # a 5 mV RTI step, so the tail stands far above the noise
    with sim.model.lock:
        sim.model.set_relays(sim.model.relays | {501}, sim.clock.now())
        t0 = sim.clock.now()
    node = sim.model.nodes[0]
    final = node.target
    step = GAIN * 50e-12 * RB
    rc = RB * FIXTURE_CAPACITANCE_F
    # after ten RC time constants the fast part is gone and about the tail share remains
    residual = abs(node.value(t0 + 1e-3 + 10 * rc) - final)
    assert 0.3 * 0.01 * step < residual < 1.5 * 0.01 * step
    late = abs(node.value(t0 + 1e-3 + 10 * rc + 3 * BIAS_TAIL_S) - final)
    assert late < residual * math.exp(-2.5)


def test_bench_config_names_rb_and_the_bias_channels():
    with SimBench(SimSettings(sites=2, parts=2)) as sim:
        text = sim.bench_config_text()
    assert "rb: [100 MOhm, 100 MOhm]" in text
    assert "plus: [501, 502]" in text and "minus: [601, 602]" in text

"""Physics of the simulated fixture, measured the way the station measures it (pyvisa-py)."""

from __future__ import annotations

import math
import time

import numpy as np
import pytest

from sim_instruments.bench import SimBench, SimSettings
from sim_instruments.model import expected_noise_rti, loop_gain, vos_true
from sim_instruments.visa_client import close_all, open_all
from station.config.rail_points import rails_for

GAIN = 1001.0  # G = 1 + Rf/Rs for 100 kOhm / 100 Ohm (servo-loop method, MIL-STD-883 TM 4001; from memory)


def power_up(res, vplus=5.0, vminus=-5.0, sites=(1, 2, 3, 4)):
    supply = res["supply"]
    supply.write(f"INST:NSEL 1;:VOLT {vplus};:OUTP ON")
    supply.write(f"INST:NSEL 2;:VOLT {vminus};:OUTP ON")
    res["switch"].write("ROUT:CLOS (@" + ",".join(str(100 + k) for k in sites) + ")")


def set_rails(res, vplus, vminus):
    res["supply"].write(f"INST:NSEL 1;:VOLT {vplus};:INST:NSEL 2;:VOLT {vminus}")


def read_mean(dmm, count=8, nplc=10):
    dmm.write(f"ZERO:AUTO OFF;:VOLT:NPLC {nplc};RANG 1;:SAMP:COUN {count}")
    return float(np.mean([float(v) for v in dmm.query("READ?").split(",")]))


@pytest.fixture
def clean_bench():
    with SimBench(SimSettings(speed=20, defects=False, handler_index_s=0.01)) as sim:
        res = open_all(sim)
        ids = res["handler"].query("HANDler:NEXT?").split(",")
        yield sim, res, {p.part_id: p for p in sim.truth() if p.part_id in ids}
        close_all(res)


def test_loop_gain_formula():
    assert loop_gain(100e3, 100.0) == GAIN  # G = 1 + Rf/Rs (MIL-STD-883 TM 4001, from memory)


def test_reading_over_true_offset_is_loop_gain(clean_bench):
    sim, res, parts = clean_bench
    power_up(res)
    time.sleep(1.0 / 20)  # 1 s of model time: settled
    truth = [vos_true(parts[f"D{k:05d}"], 0.0, 10.0) for k in range(1, 5)]
    readings = [read_mean(res[f"dmm{k}"]) for k in range(1, 5)]
    slope = np.polyfit(truth, readings, 1)[0]  # least squares, numpy reference
    assert slope == pytest.approx(GAIN, rel=5e-3)
    for reading, vos in zip(readings, truth, strict=True):
        assert reading / GAIN == pytest.approx(vos, abs=0.1e-6)


def test_gain_1001_not_1000_on_a_large_offset():
    # seed 1, part D00019 is an offset outlier (|Vos| > 0.3 mV): site 3 of the 5th index
    with SimBench(SimSettings(speed=20, handler_index_s=0.01)) as sim:
        res = open_all(sim)
        handler = res["handler"]
        for _ in range(4):
            handler.query("HANDler:NEXT?")
            for site in range(1, 5):
                handler.write(f"HANDler:BIN {site},1")
        assert handler.query("HANDler:NEXT?").split(",")[2] == "D00019"
        part = next(p for p in sim.truth() if p.part_id == "D00019")
        assert part.defect == "outlier"
        power_up(res, sites=(3,))
        time.sleep(1.0 / 20)
        res["dmm3"].write("VOLT:RANG 10")
        reading = read_mean(res["dmm3"], count=4)
        close_all(res)
    ratio = reading / vos_true(part, 0.0, 10.0)
    assert ratio == pytest.approx(GAIN, rel=3e-4)  # 1000 would be 1e-3 away


def _vos_at(res, dmm, vcm, span=10.0):
    set_rails(res, *rails_for(vcm, span))
    time.sleep(0.5 / 20)  # 0.5 s of model time, beyond the thermal tail (tau <= 40 ms)
    return read_mean(dmm, count=6) / GAIN


def test_cmrr_from_shifted_rails_matches_truth(clean_bench):
    sim, res, parts = clean_bench
    part = parts["D00001"]
    power_up(res, sites=(1,))
    low_vcm = [-4.5, -3.0, -1.5, 0.0, 1.5]
    high_vcm = [4.3, 4.6, 4.9, 5.1]  # >= 0.5 V above the crossover centre (~3.7 V)
    low = [_vos_at(res, res["dmm1"], v) for v in low_vcm]
    high = [_vos_at(res, res["dmm1"], v) for v in high_vcm]
    low_slope = np.polyfit(low_vcm, low, 1)[0]
    high_slope = np.polyfit(high_vcm, high, 1)[0]
    assert low_slope == pytest.approx(part.cmrr_low_vv, rel=0.05, abs=5e-9)
    assert high_slope == pytest.approx(part.cmrr_high_vv, rel=0.05, abs=20e-9)
    step = np.mean(high) - np.mean(low)
    assert abs(step - part.cm_step_v) < 0.1 * abs(part.cm_step_v) + 5e-6


def test_early_reading_is_off_settled_reading_within_noise():
    with SimBench(SimSettings(speed=2, sites=1, parts=1, defects=False)) as sim:
        res = open_all(sim)
        res["handler"].query("HANDler:NEXT?")
        part = sim.truth()[0]
        dmm = res["dmm1"]
        dmm.write("ZERO:AUTO OFF;:VOLT:NPLC 0.5;RANG 10")
        supply = res["supply"]
        supply.write("INST:NSEL 1;:VOLT 5;:OUTP ON;:INST:NSEL 2;:VOLT -5;:OUTP ON")
        time.sleep(0.1)
        res["switch"].write("ROUT:CLOS (@101)")  # the site powers up: a large step
        early = float(dmm.query("READ?")) / GAIN
        time.sleep(0.5)  # 1 s of model time
        settled = float(dmm.query("READ?")) / GAIN
        close_all(res)
    truth = vos_true(part, 0.0, 10.0)
    sigma = expected_noise_rti(0.5, 50.0, part, dmm_range=10.0, autozero=False)
    assert abs(early - truth) > 1e-3  # unsettled by far more than a millivolt RTI
    assert abs(settled - truth) < 5 * sigma


def test_noise_falls_as_one_over_root_integration_time(clean_bench):
    sim, res, parts = clean_bench
    power_up(res, sites=(2,))
    time.sleep(1.0 / 20)
    dmm = res["dmm2"]
    spreads = {}
    for nplc in (0.2, 2.0):
        dmm.write(f"ZERO:AUTO OFF;:VOLT:NPLC {nplc};RANG 1;:SAMP:COUN 300")
        values = np.array([float(v) for v in dmm.query("READ?").split(",")]) / GAIN
        spreads[nplc] = np.std(values, ddof=1)  # numpy reference
    ratio = spreads[0.2] / spreads[2.0]
    # White noise averaged over T: sigma ~ 1/sqrt(T), so 10x the NPLC gives sqrt(10) less
    # (the standard error of a mean; common practice, no source).
    assert ratio == pytest.approx(math.sqrt(10.0), rel=0.25)
    part = parts["D00002"]
    expected = expected_noise_rti(0.2, 50.0, part, autozero=False)
    assert spreads[0.2] == pytest.approx(expected, rel=0.2)
    # RTI noise at 1 NPLC, 50 Hz is in the 75-100 nV band the simulated fixture is built to
    # (an invented demo figure, not an outside value)
    assert 75e-9 <= expected_noise_rti(1.0, 50.0, part, autozero=False) <= 100e-9


def test_one_nplc_at_50_hz_takes_20_ms():
    # N power-line cycles at 50 Hz take N/50 s (common practice, no source)
    with SimBench(SimSettings(speed=1.0, sites=1, parts=1)) as sim:
        res = open_all(sim)
        dmm = res["dmm1"]
        dmm.write("ZERO:AUTO OFF;:VOLT:NPLC 1;:SAMP:COUN 10")
        dmm.query("*OPC?")
        start = time.perf_counter()
        dmm.query("READ?")
        plain = time.perf_counter() - start
        dmm.write("ZERO:AUTO ON")
        start = time.perf_counter()
        dmm.query("READ?")
        zeroed = time.perf_counter() - start
        close_all(res)
    assert 0.19 <= plain <= 0.40   # 10 x 20 ms, generous for a loaded machine
    assert 0.39 <= zeroed <= 0.70  # autozero doubles each reading (common practice, no source)


def test_unpowered_site_reads_overload(clean_bench):
    # SCPI reports an overload as 9.9E37 (SCPI-1999 vol. 1, numeric data; from memory).
    sim, res, _ = clean_bench
    power_up(res, sites=(1,))
    time.sleep(0.5 / 20)
    assert res["dmm2"].query("MEAS:VOLT? 10") == "+9.90000000E+37"
    assert res["dmm1"].query("MEAS:VOLT? 10") != "+9.90000000E+37"


def test_supply_current_is_iq_of_powered_sites(clean_bench):
    sim, res, parts = clean_bench
    power_up(res, sites=(1, 2))
    time.sleep(0.1 / 20)
    supply = res["supply"]
    iq = sum(parts[f"D{k:05d}"].iq(10.0) for k in (1, 2))
    assert float(supply.query("INST:NSEL 1;:MEAS:CURR?")) == pytest.approx(iq, abs=1e-6)
    assert float(supply.query("INST:NSEL 2;:MEAS:CURR?")) == pytest.approx(-iq, abs=1e-6)
    supply.write("INST:NSEL 1;:OUTP OFF")
    time.sleep(0.05 / 20)
    assert sim.state()["supply"]["ch1"]["actual_v"] == 0.0  # 5 V at 2 V/ms: 2.5 ms
    # no complete supply to the sites: only read-back noise (0.1 uA) remains
    assert float(supply.query("INST:NSEL 2;:MEAS:CURR?")) == pytest.approx(0.0, abs=1e-6)


def test_shorted_part_pulls_rails_into_limit_until_its_site_is_opened():
    # seed 1: D00004 (site 4 of the first index) is shorted
    with SimBench(SimSettings(speed=20, handler_index_s=0.01)) as sim:
        res = open_all(sim)
        res["handler"].query("HANDler:NEXT?")
        assert next(p for p in sim.truth() if p.part_id == "D00004").defect == "short"
        power_up(res)
        time.sleep(0.2 / 20)
        supply = res["supply"]
        assert float(supply.query("INST:NSEL 1;:MEAS:CURR?")) == pytest.approx(0.020, abs=1e-5)
        assert float(supply.query("MEAS:VOLT?")) < 4.0  # sagging in constant-current mode
        limited = [float(res["dmm1"].query("READ?")) for _ in range(3)]
        res["switch"].write("ROUT:OPEN (@104)")
        time.sleep(0.5 / 20)
        part1 = next(p for p in sim.truth() if p.part_id == "D00001")
        restored = read_mean(res["dmm1"]) / GAIN
        assert float(supply.query("MEAS:VOLT?")) == pytest.approx(5.0, abs=1e-3)
        close_all(res)
    assert max(abs(v / GAIN - vos_true(part1, 0.0, 10.0)) for v in limited) > 20e-6
    assert restored == pytest.approx(vos_true(part1, 0.0, 10.0), abs=0.2e-6)


def test_scanner_routes_one_site_to_the_single_dmm():
    with SimBench(SimSettings(speed=20, dmm_per_site=False, defects=False)) as sim:
        assert [r for r in sim.resources if r.startswith("dmm")] == ["dmm1"]
        res = open_all(sim)
        res["handler"].query("HANDler:NEXT?")
        power_up(res)
        time.sleep(0.5 / 20)
        dmm = res["dmm1"]
        values = {}
        for site in (2, 3):
            res["switch"].write(f"ROUT:OPEN (@201:204);:ROUT:CLOS (@{200 + site})")
            time.sleep(0.1 / 20)
            values[site] = read_mean(dmm, count=4) / GAIN
        parts = {p.site: p for p in sim.truth() if p.site}
        close_all(res)
    for site, value in values.items():
        assert value == pytest.approx(vos_true(parts[site], 0.0, 10.0), abs=0.1e-6)

"""The simulated bench's own measurement errors (site offset, DMM gain, leakage) and the study plan."""

from __future__ import annotations

import time
from collections import Counter

import numpy as np
import pytest

from sim_instruments.bench import SimBench, SimSettings
from sim_instruments.bench_errors import BenchErrorSpec, draw_bench_errors
from sim_instruments.model import vos_true
from sim_instruments.study_plan import make_study_plan
from sim_instruments.visa_client import close_all, open_all

GAIN = 1001.0


def test_errors_are_off_by_default_and_seeded():
    assert SimBench(SimSettings()).bench_errors_truth() is None
    a = draw_bench_errors(BenchErrorSpec(seed=3), 4, 4)
    assert a == draw_bench_errors(BenchErrorSpec(seed=3), 4, 4)
    assert a != draw_bench_errors(BenchErrorSpec(seed=4), 4, 4)
    # One DMM behind the scanner: every site has that DMM's gain error.
    single = draw_bench_errors(BenchErrorSpec(seed=3), 4, 1)
    assert len(set(single.dmm_gain_error)) == 1


def _read(dmm):
    dmm.write("ZERO:AUTO OFF;:VOLT:NPLC 10;RANG 1;:SAMP:COUN 8")
    return float(np.mean([float(v) for v in dmm.query("READ?").split(",")]))


def test_readings_carry_the_site_offset_gain_and_leakage():
    spec = BenchErrorSpec(seed=5, site_offset_sigma_v=20e-6, dmm_gain_sigma=0.01)
    with SimBench(SimSettings(speed=20, defects=False, handler_index_s=0.01, bench_errors=spec)) as sim:
        res = open_all(sim)
        try:
            ids = res["handler"].query("HANDler:NEXT?").split(",")
            parts = {p.part_id: p for p in sim.truth() if p.part_id in ids}
            errors = sim.errors
            assert errors is not None
            readings = {}
            for vplus, vminus in ((5.0, -5.0), (7.0, -3.0)):   # VCM 0 V and -2 V
                res["supply"].write(f"INST:NSEL 1;:VOLT {vplus};:OUTP ON")
                res["supply"].write(f"INST:NSEL 2;:VOLT {vminus};:OUTP ON")
                res["switch"].write("ROUT:CLOS (@101,102,103,104)")
                time.sleep(1.0 / 20)
                readings[vplus] = [_read(res[f"dmm{k}"]) for k in range(1, 5)]
            for k, pid in enumerate(ids, start=1):
                for vplus, vcm in ((5.0, 0.0), (7.0, -2.0)):
                    expected = ((1 + errors.dmm_gain_error[k - 1]) * GAIN
                                * (vos_true(parts[pid], vcm, 10.0) + errors.site_offset_v[k - 1]
                                   + errors.leakage_slope(k, 100e3, 100.0) * vcm))
                    assert readings[vplus][k - 1] == pytest.approx(expected, abs=0.2e-6 * GAIN)
            truth = sim.bench_errors_truth()
            assert truth is not None and truth["site_offset_v"] == list(errors.site_offset_v)
        finally:
            close_all(res)


@pytest.mark.parametrize("reseat", [True, False])
def test_study_plan_puts_every_part_in_every_site_repeats_times(reseat):
    plan = make_study_plan(parts=5, repeats=3, sites=4, reseat=reseat)
    visits = Counter((part, site) for index in plan.indexes for site, part in enumerate(index, 1)
                     if part is not None)
    assert set(visits) == {(p, s) for p in range(5) for s in range(1, 5)}
    assert set(visits.values()) == {3}
    # Without re-seating a part's repeats follow each other in one site.
    moves = sum(a != b for a, b in zip(plan.indexes, plan.indexes[1:], strict=False))
    assert moves == (len(plan.indexes) - 1 if reseat else len(plan.indexes) // 3 - 1)

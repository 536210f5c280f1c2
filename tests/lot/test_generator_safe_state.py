"""The function generator is part of the safe state: off on the way out, and said so when an
instrument will not confirm it."""

from __future__ import annotations

from sim_instruments.bench import SimBench, SimSettings
from station.config.bench_config import parse_bench_config
from station.lot.bench import open_bench


def _bench(sim: SimBench):
    return open_bench(parse_bench_config(sim.bench_config_text(), "sim-bench.yaml"))


def test_safe_state_switches_the_generator_off_first():
    with SimBench(SimSettings(seed=2, sites=1, parts=2, speed=50.0, generator=True)) as sim:
        bench = _bench(sim)
        try:
            assert bench.generator is not None
            bench.generator.set_sine(1e3, 1.0)
            bench.generator.output(True)
            assert sim.model.generator.output
            log = bench.safe_state()
            assert log[0].startswith("generator: output off:")
            assert not sim.model.generator.output and bench.is_safe
        finally:
            bench.close()


def test_a_generator_stuck_on_is_reported_and_the_rest_still_made_safe():
    with SimBench(SimSettings(seed=2, sites=1, parts=2, speed=50.0, generator=True)) as sim:
        bench = _bench(sim)
        try:
            assert bench.generator is not None
            bench.generator.output(True)
            sim.faults("generator").output_stuck_on = True
            bench.safe_state()
            assert not bench.is_safe
            assert bench.unverified == ["generator: generator output may still be live: switch it off at the instrument"]
            assert not sim.model.force_output and sim.model.relays == set()   # the others still done
        finally:
            sim.faults("generator").output_stuck_on = False
            bench.close()

"""An overload reading (SCPI 9.9E37: SCPI-1999 vol. 1, from memory; docs/bench-commands.md) is
an over-range result of the test: the part fails its limits, it is not a tester fault and not
a missing number."""

from __future__ import annotations

import math

from station.config.plan import build_plan
from station.demo import DEMO_LIMITS
from station.lot.bench import open_bench
from station.lot.index_screen import IndexScreen
from station.lot.site_readings import SiteReader
from tests.support.reliability_bench import served, write_sequence


class _SiteTwoUnpowered:
    """The fixture switch, except that site 2's power relay never closes after the contact
    check: the site reads an open loop (the node saturates, the DMM overloads)."""

    def __init__(self, switch) -> None:
        self._switch = switch
        self.contact_done = False

    def power_sites(self, sites: set[int]) -> None:
        if len(sites) > 1:  # the contact check powers each site alone, then the good ones together
            self.contact_done = True
        if self.contact_done:
            sites = set(sites) - {2}
        self._switch.power_sites(sites)

    def __getattr__(self, name):
        return getattr(self._switch, name)


def test_open_site_reads_over_range_and_fails_limits(tmp_path):
    sequence = write_sequence(tmp_path)
    with served(tmp_path, seed=3, parts=4, sites=2) as (sim, bench_path):
        plan = build_plan(bench_path, sequence, DEMO_LIMITS)
        bench = open_bench(plan.bench)
        try:
            switch = _SiteTwoUnpowered(bench.switch)
            bench.switch = switch  # type: ignore[assignment]
            reader = SiteReader(dmms=bench.dmms, switch=switch, loop_gain=plan.bench.loop_gain,
                                dmm_per_site=True, dmm_range_v=plan.sequence.dmm_range_v,
                                autozero=plan.sequence.autozero)
            screen = IndexScreen(bench, plan, reader)
            screen.power_up()
            ids = bench.handler.next_index()
            assert ids is not None and ids[1] is not None
            site2 = {o.site: o for o in screen.screen(ids)}[2]
        finally:
            bench.safe_state()
            bench.close()
    assert site2.fault == "" and site2.error is None
    assert site2.verdict.passed is False                   # a DUT result: fails, not a fault
    assert site2.verdict.hard_bin == plan.table.fail_hard_bin
    vos = [row for row in site2.rows if row.test.param == "vos"]
    assert vos and math.isinf(vos[0].value) and vos[0].passed is False

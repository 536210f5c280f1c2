"""A small version of the soak (tests/support/soak_run.py): 60 parts, faults injected at seeded
random intervals, nothing lost or doubled, no part left in the tester-fault bin."""

from __future__ import annotations

from tests.support import soak_run


def test_small_soak(tmp_path):
    result = soak_run.screen(tmp_path, parts=60, seed=5, speed=50.0, sites=4, fault_mean_s=1.5, timeout_s=0.3)
    assert soak_run.check(result, None) == []
    assert sum(result["faults_injected"].values()) >= 1      # the injector did inject
    assert result["rows"] == 60 + result["retests"]

"""The demo's PAT table and guarded sequence load, and plan together with the demo bench."""

from __future__ import annotations

from dataclasses import replace

from station.config.limit_tables import load_limit_table
from station.config.plan import build_plan
from station.config.sequence import load_sequence
from tests.support.review_datalogs import ROOT


def test_demo_pat_table_and_guarded_sequence() -> None:
    table = load_limit_table(ROOT / "limits" / "px401_pat.yaml")
    assert table.pat is not None and table.pat.dynamic is not None
    assert not table.hard_bins[table.pat.hard_bin].passing
    seq = load_sequence(ROOT / "sequences" / "px401_screen_guarded.yaml")
    assert {r.kind for r in seq.lot_control} == {"consecutive_fails", "soft_bin_share", "site_yield",
                                                 "rolling_yield"}
    # the guarded sequence is the demo sequence plus its lot_control section
    plain = load_sequence(ROOT / "sequences" / "px401_screen.yaml")
    assert [replace(t, line=None) for t in seq.tests] == [replace(t, line=None) for t in plain.tests]
    plan = build_plan(ROOT / "benches" / "example-bench.yaml", ROOT / "sequences" / "px401_screen_guarded.yaml",
                      ROOT / "limits" / "px401_pat.yaml")
    assert plan.table.pat is not None

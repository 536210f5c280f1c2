"""The benchmark runs end to end in its smallest mode (sizes only: this test never times it)."""

from __future__ import annotations

import json
import math

import pytest

from benchmarks.__main__ import main
from benchmarks.physics_floor import FloorBench, index_floor, worst_case_wait
from sim_instruments.population import make_population
from station.config.sequence import load_sequence
from station.demo import DEMO_SEQUENCE

KEYS = ("floor_ratio", "adaptive_speedup", "overhead_ratio", "multisite_speedup_4", "misbin_rate",
        "escapes", "datalog_rows_per_s", "summary_1m_rows_s", "hislip_round_trip_ratio",
        "station_cpu_ms_per_part", "station_cpu_pct_of_test_time", "soak_rss_growth_mb", "summary_1m_peak_rss_mb")


def test_physics_floor_holds_at_least_the_integrations():
    sequence = load_sequence(DEMO_SEQUENCE)
    part = next(p for p in make_population(2, 10) if p.defect == "none")
    # N NPLC at 50 Hz take N/50 s (common practice, no source).
    integrations = sum(t.nplc / 50.0 * t.average * len(t.points or t.levels_v or t.spans_v or [0])
                       for t in sequence.tests if t.kind in ("offset", "cm_sweep", "gain", "supply_rejection"))
    integrations += sum(t.nplc / 50.0 * t.average * 4 for t in sequence.steps("bias_current"))  # 4 Rb states
    waits: list[float] = []
    floor = index_floor(sequence, [part], FloorBench(), waits)
    assert floor == pytest.approx(integrations + sum(waits) + 0.004, abs=0.01)  # + a few relay times
    assert len(waits) == 1 + 15 + 2 + 2 + 4 and all(w >= 0 for w in waits)
    assert worst_case_wait(sequence, [part], FloorBench()) >= max(waits)


def test_benchmark_smoke_gives_every_figure(tmp_path, capsys):
    out = tmp_path / "figures.json"
    main(["--smoke", "--json", str(out)])
    figures = json.loads(out.read_text())
    for key in KEYS:
        assert key in figures, key
        assert figures[key] is not None and math.isfinite(figures[key]), (key, figures[key])
    assert set(figures["cmrr_rms_error_db"]) == {"low", "high"}
    # every misbinned or escaped part is named, once
    wrong = figures["wrongly_binned"]
    assert max(figures["misbins"], figures["escapes"]) <= len(wrong) <= figures["misbins"] + figures["escapes"]
    assert figures["machine"]["cores"] >= 1 and figures["machine"]["cpu"]
    # every section says whether other work ran meanwhile, and its target keys are marked if so
    assert set(figures["load"]) == {"floor", "multisite", "accuracy", "overhead", "datalog", "summary", "soak",
                                "transports"}
    for section, watch in figures["load"].items():
        assert isinstance(watch["loaded"], bool), section
        assert watch["other_processes_cpu_share"] is None or watch["other_processes_cpu_share"] >= 0
    assert all(key in figures for key in figures["loaded_keys"])
    assert "floor_ratio" in capsys.readouterr().out  # the table was printed

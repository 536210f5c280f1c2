"""Budgets on a dry-run lot: logged by the sequence's budget test, recomputed offline by
`station budget`, shown per application by `station summary`, and refused where the lot
cannot answer."""

from __future__ import annotations

import shutil
from pathlib import Path

import pandas as pd
import pytest
from click.testing import CliRunner

from station.cli.main import main
from station.config.files import ConfigError
from station.config.plan import build_plan
from station.config.sequence import load_sequence
from station.demo import DEMO_LIMITS, DEMO_SEQUENCE, EXAMPLE_BENCH
from station.kinds.budget import applications_of
from station.review.budget import logged_budgets
from station.review.console import summary_tables
from station.review.load import load_datalogs
from station.review.summary import summarise

APPS = DEMO_SEQUENCE.parent / "px401_apps.yaml"


@pytest.fixture(scope="module")
def lot(tmp_path_factory) -> Path:
    out = tmp_path_factory.mktemp("budget") / "lot"
    result = CliRunner().invoke(main, ["dry-run", "--parts", "8", "--sites", "4", "--seed", "5",
                                       "--speed", "20", "--out", str(out), "--lot", "BUDGET"])
    assert result.exit_code == 0, result.output
    return out


def test_offline_budget_equals_the_logged_one(lot: Path, tmp_path: Path):
    csv = tmp_path / "budget.csv"
    result = CliRunner().invoke(main, ["budget", str(lot), "--app", str(APPS), "--csv", str(csv), "--within", "60 uV"])
    assert result.exit_code == 0, result.output
    assert "buf33" in result.output and "direct <= 60 uV" in result.output
    offline = pd.read_csv(csv).set_index(["PART_ID", "application"]).sort_index()
    logged = logged_budgets(load_datalogs([lot]).results).set_index(["PART_ID", "application"]).sort_index()
    assert len(offline) == len(logged) >= 4 * 6
    for param in ("app_err", "app_err_rss", "app_err_vos", "app_err_cm", "app_err_out", "app_err_ib"):
        assert offline[param].to_numpy() == pytest.approx(logged[param].to_numpy(), rel=1e-9)


def test_the_crossing_buffer_contains_each_parts_crossover_step(lot: Path):
    results = load_datalogs([lot]).results
    steps = results[results["PARAM"] == "cm_step"].set_index("PART_ID")["RESULT"]
    budgets = logged_budgets(results).set_index(["application", "PART_ID"])
    crossing, low = budgets.loc["buf33", "app_err_cm"], budgets.loc["buf_low", "app_err_cm"]
    for part_id, step in steps.items():
        # the step is the spread inside the transition region; the crossing range holds all of it
        assert crossing[part_id] >= 0.99 * step, part_id
    big = steps[steps > 30e-6].index
    assert len(big) >= 2
    assert all(low[p] < 0.5 * steps[p] for p in big)     # the low-region buffer never sees it


def test_summary_shows_the_budget_per_application(lot: Path):
    summary = summarise(load_datalogs([lot]))
    assert summary.budgets is not None
    assert list(summary.budgets["application"]) == ["buf33", "buf_low", "gain10", "inv5"]
    titles = [str(t.title) for t in summary_tables(summary)]
    assert any(t.startswith("Application error budget") for t in titles)


def test_an_application_the_lot_cannot_answer_is_refused(lot: Path, tmp_path: Path):
    wide = tmp_path / "wide.yaml"
    wide.write_text("applications:\n  - {name: w, circuit: buffer, supply: {low: -6 V, high: 6 V},\n"
                    "     input: {low: -1 V, high: 1 V}}\n", encoding="utf-8")
    result = CliRunner().invoke(main, ["budget", str(lot), "--app", str(wide)])
    assert result.exit_code == 2
    assert f"{wide}: application 'w' runs on a 12 V supply, wider than the 10 V" in result.output


def _limited(tmp_path: Path, application: str, high: str) -> Path:
    """The demo limit table with grade A limiting the direct error in `application`."""
    text = DEMO_LIMITS.read_text(encoding="utf-8")
    anchor = "      - {param: ios,       low: -2 pA, high: 2 pA, soft_bin: 24, bin: Input offset current}\n"
    assert anchor in text
    line = f"      - {{param: app_err, region: {application}, high: {high}, soft_bin: 25, bin: Application error}}\n"
    limits = tmp_path / "limits.yaml"
    limits.write_text(text.replace(anchor, anchor + line, 1), encoding="utf-8")
    return limits


def test_a_limit_on_an_application_the_sequence_does_not_budget_is_refused(tmp_path: Path):
    with pytest.raises(ConfigError, match="application 'buf_high', which the sequence does not budget"):
        build_plan(EXAMPLE_BENCH, DEMO_SEQUENCE, _limited(tmp_path, "buf_high", "60 uV"))


def test_a_grade_limits_the_error_in_an_application(tmp_path: Path):
    # 60 uV in the 0-3.3 V buffer, whose range crosses the crossover: parts with a big step lose grade A
    out = tmp_path / "lot"
    result = CliRunner().invoke(main, ["dry-run", "--parts", "8", "--sites", "4", "--seed", "5", "--speed", "20",
                                       "--out", str(out), "--limits", str(_limited(tmp_path, "buf33", "60 uV"))])
    assert result.exit_code == 0, result.output
    results = load_datalogs([out]).results
    parts = load_datalogs([out]).parts.set_index("PART_ID")
    errors = results[(results["PARAM"] == "app_err") & (results["REGION"] == "buf33")].set_index("PART_ID")
    over = errors.index[errors["RESULT"] > 60e-6]
    assert len(over) >= 1 and len(over) < len(errors)
    for part_id in over:
        assert parts.loc[part_id, "GRADE"] != "A", part_id   # over the limit: never grade A
    graded_a = parts.index[parts["GRADE"] == "A"]
    assert len(graded_a) >= 1
    assert all(errors.loc[p, "HI_LIMIT"] == pytest.approx(60e-6) for p in graded_a)  # the limit was applied


def test_the_datalog_keeps_the_application_file(lot: Path, tmp_path: Path):
    assert (lot / "applications.yaml").read_bytes() == APPS.read_bytes()
    # the copy is what the lot's own sequence copy reads, wherever the folder goes
    moved = tmp_path / "moved"
    shutil.copytree(lot, moved)
    result = CliRunner().invoke(main, ["verify", str(moved)])
    assert result.exit_code == 0, result.output
    copy = moved / "sequence.yaml"
    assert [a.name for a in applications_of(load_sequence(copy), copy)] == ["buf33", "buf_low", "gain10", "inv5"]

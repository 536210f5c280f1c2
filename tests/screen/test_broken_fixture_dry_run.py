"""End to end on the simulated bench: a site whose contact breaks at part 40 stops (or pauses)
the lot within the configured number of parts; nothing after the stop is sorted; --resume
continues the lot once the fixture is repaired."""

from __future__ import annotations

import json
from pathlib import Path

import pandas as pd
import pytest
from click.testing import CliRunner

from station.cli.main import main
from tests.support.review_datalogs import ROOT

COUNT = 4
ARGS = ["--parts", "80", "--sites", "4", "--seed", "3", "--speed", "1000"]


def _sequence(tmp_path: Path, action: str) -> Path:
    path = tmp_path / f"seq_{action}.yaml"
    # The demo sequence's budget step reads its application file beside the sequence.
    (tmp_path / "px401_apps.yaml").write_text((ROOT / "sequences" / "px401_apps.yaml").read_text())
    path.write_text((ROOT / "sequences" / "px401_screen.yaml").read_text()
                    + f"lot_control:\n  - {{rule: consecutive_fails, count: {COUNT}, action: {action}}}\n")
    return path


def test_a_broken_site_stops_the_lot_and_resume_continues(tmp_path: Path) -> None:
    seq, out = _sequence(tmp_path, "stop"), tmp_path / "lot"
    result = CliRunner().invoke(main, ["dry-run", *ARGS, "--sequence", str(seq), "--out", str(out),
                                       "--lot", "BRK-1", "--fixture-fault", "contact:2@40"])
    assert result.exit_code == 3, result.output
    lot = json.loads((out / "lot.json").read_text())
    assert lot["complete"] is False and lot["paused"] is False
    [alarm] = lot["alarms"]
    assert alarm["rule"] == "consecutive_fails" and alarm["action"] == "stop" and alarm["site"] == 2
    assert set(alarm) == {"rule", "action", "site", "message", "parts", "time"}
    parts = pd.read_csv(out / "parts.csv", dtype={"PART_ID": str})
    site2 = parts[parts["SITE_NUM"] == 2]
    broken = site2[site2["PART_ID"].str[1:].astype(int) >= 40]
    # every part on the broken site failed, and the lot stopped at the COUNT-th of them
    assert (broken["PASS"] == 0).all() and len(broken) == COUNT
    assert alarm["parts"] == broken["PART_ID"].tolist()
    # the lot stopped after the index of the alarm: no later part was logged or sorted
    last = int(parts["PART_ID"].str[1:].astype(int).max())
    assert last == int(alarm["parts"][-1][1:]) + 2          # the rest of that 4-site index
    truth = pd.read_csv(out / "sim_truth.csv", dtype={"PART_ID": str})
    sorted_ids = truth.loc[truth["BINNED_HARD_BIN"].notna(), "PART_ID"].str[1:].astype(int)
    assert sorted_ids.max() == last and len(sorted_ids) == len(parts)
    assert "lot control" in result.output and "resume it with" in result.output
    # the summary shows the alarm
    summary = CliRunner().invoke(main, ["summary", str(out)])
    assert summary.exit_code == 0, summary.output
    assert "consecutive_fails" in summary.output and "site 2" in summary.output

    # repaired fixture (no --fixture-fault): --resume finishes the lot, keeping the alarm
    resumed = CliRunner().invoke(main, ["dry-run", "--resume", str(out), "--sequence", str(seq), "--speed", "1000"])
    assert resumed.exit_code == 0, resumed.output
    lot = json.loads((out / "lot.json").read_text())
    assert lot["complete"] is True and lot["parts_tested"] == 80 and len(lot["alarms"]) == 1
    parts = pd.read_csv(out / "parts.csv", dtype={"PART_ID": str})
    assert parts["PART_ID"].is_unique and len(parts) == 80


@pytest.mark.parametrize("answer", ["skip", "stop"])
def test_a_pause_asks_the_operator_with_the_bench_safe(tmp_path: Path, answer: str) -> None:
    seq, out = _sequence(tmp_path, "pause"), tmp_path / "lot"
    result = CliRunner().invoke(main, ["dry-run", *ARGS, "--sequence", str(seq), "--out", str(out),
                                       "--lot", "BRK-2", "--fixture-fault", "contact:2@40"], input=f"{answer}\n")
    lot = json.loads((out / "lot.json").read_text())
    assert "LOT PAUSED" in result.output and "paused, safe state" in result.output
    assert lot["paused"] is False and lot["alarms"][0]["action"] == "pause"
    assert lot["operator_decisions"][0]["choice"] == answer
    parts = pd.read_csv(out / "parts.csv", dtype={"PART_ID": str}, keep_default_na=False)
    if answer == "stop":
        assert result.exit_code == 3, result.output
        assert len(parts) < 80
        return
    assert result.exit_code == 0, result.output
    assert lot["skipped_sites"] == [2]
    after = parts[(parts["SITE_NUM"] == 2) & (parts["PART_ID"].str[1:].astype(int) > int(lot["alarms"][0]["parts"][-1][1:]))]
    # the skipped site's later parts are not tested: logged to the retest bin, no pass/fail
    assert len(after) > 0 and (after["HARD_BIN"] == 9).all() and (after["PASS"] == "").all()
    assert after["FAULT"].str.contains("skipped by the operator").all()
    others = parts[parts["SITE_NUM"] != 2]
    assert (others["HARD_BIN"] != 9).all()

"""The review tools on a real datalog written by `station dry-run` (the simulated bench)."""

from __future__ import annotations

import subprocess
import sys
from pathlib import Path

import pandas as pd
import pytest

from station.config.limit_tables import load_limit_table
from station.review.load import load_datalogs
from station.review.propose import propose
from station.review.rebin import grade_yield, rebin
from station.review.summary import summarise

ROOT = Path(__file__).resolve().parents[2]


@pytest.fixture(scope="module")
def datalog(tmp_path_factory) -> Path:
    out = tmp_path_factory.mktemp("dry") / "lot"
    run = subprocess.run([sys.executable, "-m", "station.cli", "dry-run", "--parts", "12", "--sites", "4",
                          "--speed", "1000", "--seed", "7", "--out", str(out)],
                         cwd=ROOT, capture_output=True, text=True, timeout=240)
    assert run.returncode == 0, run.stderr[-2000:]
    return out


def test_own_limits_reproduce_the_logged_bins(datalog: Path) -> None:
    logs = load_datalogs([datalog])
    assert not logs.warnings
    result = rebin(logs, load_limit_table(datalog / "limits.yaml"))
    logged = pd.read_csv(datalog / "parts.csv")
    for column in ("HARD_BIN", "SOFT_BIN", "PASS", "FAIL_TEST"):
        assert result.after[column].fillna(-1).tolist() == logged[column].fillna(-1).tolist(), column
    assert result.after["GRADE"].fillna("").astype(str).tolist() == logged["GRADE"].fillna("").astype(str).tolist()


def test_summary_counts_and_proposed_yield(datalog: Path) -> None:
    logs = load_datalogs([datalog])
    parts = pd.read_csv(datalog / "parts.csv")
    summary = summarise(logs)
    assert summary.overview["parts tested"] == len(parts) == 12
    assert summary.overview["good"] == int((parts["PASS"] == 1).sum())
    _, table, _, _, overall = propose(logs, "PX-401-DRY", 3.0)
    assert grade_yield(rebin(logs, table).after, ["P"])["P"] == pytest.approx(overall)

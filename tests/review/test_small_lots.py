"""`station summary` on small lots: every size a short engineering run produces.

A 4-part dry run once crashed the per-site test (scipy's Monte Carlo Fisher test returns
one-element arrays on some small tables). Every combination here must give a summary, the
by-site table and the HTML report, with exit 0 and counts that add up to the parts file.
"""

from __future__ import annotations

import re
import subprocess
import sys
from pathlib import Path

import pandas as pd
import pytest
from click.testing import CliRunner

from station.cli.main import main as cli
from tests.support.review_datalogs import PX401_LIMITS, LotSpec, make_datalog

ROOT = Path(__file__).resolve().parents[2]
NO_SPECIALS = {"tester_faults": 0, "opens": 0, "shorts": 0, "retests": 0}


def _summarise(folder: Path, tmp_path: Path, html: bool = True) -> str:
    report = tmp_path / "report.html"
    args = ["summary", str(folder), "--by", "site"] + (["--html", str(report)] if html else [])
    result = CliRunner().invoke(cli, args, env={"COLUMNS": "160"})
    assert result.exit_code == 0, result.output
    assert "Traceback" not in result.output and "station error" not in result.output
    if html:    # the report's plots are the slow part: drawn for the smallest and largest lots
        assert report.stat().st_size > 0
    return result.output


@pytest.mark.parametrize("parts", [1, 2, 3, 5, 8])
@pytest.mark.parametrize("sites", [1, 2, 3, 4])
def test_summary_of_a_small_lot(tmp_path: Path, parts: int, sites: int) -> None:
    folder = make_datalog(tmp_path / "lot", LotSpec(parts=parts, sites=sites, seed=parts * 10 + sites,
                                                    **NO_SPECIALS))
    output = _summarise(folder, tmp_path, html=parts in (1, 8))
    logged = pd.read_csv(folder / "parts.csv")
    assert f"{len(logged)}" in output
    # A site with no part (fewer parts than sites) is reported without a test, never a crash.
    if parts < sites:
        assert logged["SITE_NUM"].nunique() == parts


def test_summary_when_every_part_fails(tmp_path: Path) -> None:
    # A Vos window no part can meet: every part is a fail bin (the limit table is otherwise ours).
    text = PX401_LIMITS.read_text()
    tight = make_datalog(tmp_path / "all_fail", LotSpec(parts=6, sites=3, **NO_SPECIALS,
                                                        limits_text=_impossible_vos(text)))
    logged = pd.read_csv(tight / "parts.csv")
    assert not logged["PASS"].astype(bool).any()
    output = _summarise(tight, tmp_path)
    assert "every part passed, or every part failed" in output or "no test" in output


def test_summary_of_the_four_part_dry_run(tmp_path: Path) -> None:
    # The exact run of the report: station dry-run --parts 4 --seed 3, then summary.
    out = tmp_path / "N4"
    run = subprocess.run([sys.executable, "-m", "station.cli", "dry-run", "--parts", "4", "--seed", "3",
                          "--speed", "1000", "--out", str(out), "--lot", "N4"],
                         cwd=ROOT, capture_output=True, text=True, timeout=240)
    assert run.returncode == 0, run.stderr[-2000:]
    _summarise(out, tmp_path)


def _impossible_vos(text: str) -> str:
    """The demo table with every grade's Vos limit at +-1 nV."""
    changed = re.sub(r"(\{param: vos,\s*)low: [^,]+, high: [^,]+,", r"\1low: -1 nV, high: 1 nV,", text)
    assert changed != text, "the demo table has no Vos limit to tighten"
    return changed

"""The report's CMRR-versus-frequency plot, from a dry run of the difference-amplifier demo."""

from __future__ import annotations

import re
from pathlib import Path

import numpy as np
import pandas as pd
import pytest
from click.testing import CliRunner

from station.cli.main import main
from station.demo import AC_LIMITS, AC_SEQUENCE, DIFFAMP_BENCH
from station.review.load import load_datalogs
from station.review.report import folder_report_data, write_report
from station.review.summary import summarise


@pytest.fixture(scope="module")
def lot(tmp_path_factory) -> Path:
    out = tmp_path_factory.mktemp("ac") / "lot"
    result = CliRunner().invoke(main, ["dry-run", "--bench", str(DIFFAMP_BENCH), "--sequence", str(AC_SEQUENCE),
                                       "--limits", str(AC_LIMITS), "--parts", "6", "--seed", "8", "--speed", "50",
                                       "--out", str(out), "--lot", "ACREP"])
    assert result.exit_code == 0, result.output
    return out


def test_curve_per_grade_is_the_percentiles_of_the_datalog(lot: Path) -> None:
    logs = load_datalogs([lot])
    data = folder_report_data(logs, summarise(logs))
    # Recomputed from the CSV files alone (numpy's percentiles), not from the loader.
    results, parts = pd.read_csv(lot / "results.csv"), pd.read_csv(lot / "parts.csv")
    grade = parts.set_index("PART_ID")["GRADE"].fillna("no grade").astype(str)
    rows = results[results["PARAM"] == "cmrr_ac"]
    assert len(data.ac_cmrr) == len(set(zip(rows["PART_ID"].map(grade), rows["REGION"], strict=True)))
    for curve in data.ac_cmrr.itertuples():
        label = f"{curve.FREQ_HZ / 1e3:g} kHz" if curve.FREQ_HZ >= 1e3 else f"{curve.FREQ_HZ:g} Hz"
        own = rows[(rows["REGION"] == label) & (rows["PART_ID"].map(grade) == curve.GRADE)]["RESULT"]
        assert curve.PARTS == len(own)
        assert curve.P50 == pytest.approx(np.median(own))
        assert curve.P10 == pytest.approx(np.percentile(own, 10)) and curve.P90 == pytest.approx(np.percentile(own, 90))


def test_report_holds_the_plot(lot: Path, tmp_path: Path) -> None:
    logs = load_datalogs([lot])
    html = write_report(logs, summarise(logs), tmp_path / "report.html").read_text()
    titles = re.findall(r'<img alt="([^"]*)" src="data:image/png;base64,', html)
    assert "CMRR versus frequency per grade (difference amplifier)" in titles
    assert "Common-mode rejection versus frequency" in html
    assert "Histogram: cmrr_ac 1 kHz" in titles and "Histogram: cmrr_ac_f3db" in titles

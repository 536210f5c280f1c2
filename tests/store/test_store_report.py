"""`station summary --store URL --html` and `--parquet DIR --html`: the report counted in the
database. Its histograms must be numpy.histogram's over the same results (numpy is the
reference for the bars: equal-width bins between the minimum and the maximum, the last bin
closed), and the report must carry the same plots as the report of the folders."""

from __future__ import annotations

import re
from pathlib import Path

import numpy as np
import pytest
from click.testing import CliRunner

from station.cli.main import main
from station.review.load import load_datalogs
from station.review.report import folder_report_data
from station.review.summary import summarise
from station.store.connect import connect
from station.store.engines import duckdb_engine, postgres_engine
from station.store.parquet import open_history
from station.store.report_sql import report_data_sql
from station.store.summary_sql import Selection, summarise_sql
from tests.support.review_datalogs import LotSpec, make_datalog


@pytest.fixture(scope="module")
def floor(tmp_path_factory) -> list[Path]:
    base = tmp_path_factory.mktemp("floor")
    return [make_datalog(base / "a", LotSpec(parts=120, lot_id="LOT-R1", station="bench-1", seed=11)),
            make_datalog(base / "b", LotSpec(parts=100, lot_id="LOT-R2", station="bench-2", seed=12,
                                             start_t=1_796_065_200.0))]


def titles(html: str) -> list[str]:
    return sorted(re.findall(r'<img alt="([^"]*)"', html))


def check_against_numpy(data, floor: list[Path]) -> None:
    logs = load_datalogs(floor)
    want = folder_report_data(logs, summarise(logs))
    assert set(data.histograms) == set(want.histograms)
    for key, (counts, edges) in data.histograms.items():
        values = logs.results[(logs.results["PARAM"] == key[0]) & (logs.results["REGION"] == key[1])]["RESULT"]
        finite = values.to_numpy()[np.isfinite(values.to_numpy())]
        reference, reference_edges = np.histogram(finite, bins=len(counts))
        np.testing.assert_allclose(edges, reference_edges, rtol=1e-12)
        assert counts.tolist() == reference.tolist(), key
    assert data.curve_parts == want.curve_parts
    assert len(data.curves) == len(want.curves) == 30
    assert data.regions == want.regions
    assert [lot["lot_id"] for lot in data.lots] == ["LOT-R1", "LOT-R2"]


def test_store_report_bars_are_numpys_and_the_plots_those_of_the_folders(store: str, floor: list[Path],
                                                                          tmp_path: Path) -> None:
    runner = CliRunner()
    assert runner.invoke(main, ["publish", *map(str, floor), "--store", store]).exit_code == 0
    with connect(store, autocommit=True) as conn:
        engine = postgres_engine(conn)
        summary = summarise_sql(engine, Selection())
        check_against_numpy(report_data_sql(engine, Selection(), summary, "store"), floor)

    from_store, from_folders = tmp_path / "store.html", tmp_path / "folders.html"
    result = runner.invoke(main, ["summary", "--store", store, "--html", str(from_store)])
    assert result.exit_code == 0, result.output
    assert runner.invoke(main, ["summary", *map(str, floor), "--html", str(from_folders)]).exit_code == 0
    html = from_store.read_text(encoding="utf-8")
    assert titles(html) == titles(from_folders.read_text(encoding="utf-8"))
    assert "LOT-R1" in html and "LOT-R2" in html and re.search(r"sha256 [0-9a-f]{64}", html)
    assert "from store postgresql://" in html
    assert not re.search(r'(src|href)="(?!data:)', html)          # still one self-contained file


def test_parquet_report_bars_are_numpys(floor: list[Path], tmp_path: Path) -> None:
    runner = CliRunner()
    out = tmp_path / "history"
    assert runner.invoke(main, ["export", *map(str, floor), "--to", "parquet", str(out)]).exit_code == 0
    history = open_history(out)
    try:
        engine = duckdb_engine(history)
        summary = summarise_sql(engine, Selection())
        check_against_numpy(report_data_sql(engine, Selection(), summary, "history"), floor)
    finally:
        history.close()
    page = tmp_path / "history.html"
    result = runner.invoke(main, ["summary", "--parquet", str(out), "--station", "bench-2", "--html", str(page)])
    assert result.exit_code == 0, result.output
    html = page.read_text(encoding="utf-8")
    assert "LOT-R2" in html and "LOT-R1" not in html and "station bench-2" in html

"""Parquet history: `station export --to parquet` from folders or from the store, partitioned
by product and month; `station summary --parquet` (DuckDB) equals the folder summary."""

from __future__ import annotations

from pathlib import Path

import pyarrow.parquet as pq
import pytest
from click.testing import CliRunner

from station.cli.main import main
from station.review.load import load_datalogs
from station.review.summary import summarise
from station.store.parquet import parquet_summary
from station.store.summary_sql import Selection
from tests.store.test_store_summary import assert_same_summary
from tests.support.review_datalogs import LotSpec, hold_back_last_index, make_datalog


@pytest.fixture(scope="module")
def folders(tmp_path_factory) -> list[Path]:
    base = tmp_path_factory.mktemp("history")
    return [make_datalog(base / "a", LotSpec(parts=90, lot_id="LOT-1", station="bench-1", seed=4)),
            # a month later: another month partition
            make_datalog(base / "b", LotSpec(parts=70, lot_id="LOT-2", station="bench-2", seed=5,
                                             start_t=1_798_740_000.0))]


@pytest.mark.parametrize("by", [None, "station", "hour"])
def test_parquet_summary_equals_the_folder_summary(folders: list[Path], tmp_path: Path, by: str | None) -> None:
    out = tmp_path / "history"
    result = CliRunner().invoke(main, ["export", *map(str, folders), "--to", "parquet", str(out)])
    assert result.exit_code == 0, result.output
    months = sorted(p.name for p in (out / "parts" / "product=PX-401").iterdir())
    assert months == ["month=2026-11", "month=2026-12"]   # lots start 2026-11-30 and 2026-12-31 (UTC)
    # A second export of the same folders replaces their files: no second copy.
    assert CliRunner().invoke(main, ["export", str(folders[0]), "--to", "parquet", str(out)]).exit_code == 0
    assert sum(pq.read_table(f).num_rows for f in (out / "parts").rglob("*.parquet")) == 94 + 74
    want = summarise(load_datalogs(folders), by=by)
    assert_same_summary(parquet_summary(out, Selection(), by=by), want)


def test_store_export_gives_the_same_history(store: str, folders: list[Path], tmp_path: Path) -> None:
    runner = CliRunner()
    assert runner.invoke(main, ["publish", *map(str, folders), "--store", store]).exit_code == 0
    out = tmp_path / "from-store"
    result = runner.invoke(main, ["export", "--store", store, "--to", "parquet", str(out)])
    assert result.exit_code == 0, result.output
    assert_same_summary(parquet_summary(out, Selection(station="bench-2"), by="lot"),
                        summarise(load_datalogs([folders[1]]), by="lot"))
    summary = runner.invoke(main, ["summary", "--parquet", str(out), "--product", "PX-401"])
    assert summary.exit_code == 0 and "Lot summary" in summary.output


def test_summary_of_a_folder_without_history_is_refused(tmp_path: Path) -> None:
    result = CliRunner().invoke(main, ["summary", "--parquet", str(tmp_path)])
    assert result.exit_code == 2 and "no Parquet history here" in result.output


def _rows(out: Path, table: str) -> int:
    return sum(pq.read_table(f).num_rows for f in (out / table).rglob("*.parquet"))


def test_a_growing_lot_is_exported_piece_by_piece(tmp_path: Path) -> None:
    folder = make_datalog(tmp_path / "a", LotSpec(parts=12, tester_faults=0, retests=0))
    out = tmp_path / "history"
    runner = CliRunner()
    # The lot is running: its last index (4 parts) is still under test.
    hold_back_last_index(folder)
    first = runner.invoke(main, ["export", str(folder), "--to", "parquet", str(out)])
    assert first.exit_code == 0 and "8 parts (written)" in first.output, first.output
    (folder / "in_progress.json").unlink()
    second = runner.invoke(main, ["export", str(folder), "--to", "parquet", str(out)])
    assert second.exit_code == 0 and "12 parts (4 new)" in second.output, second.output
    pieces = sorted(p.name for p in (out / "parts").rglob("*.parquet"))
    assert len(pieces) == 2 and sum(p.endswith("-000000008.parquet") for p in pieces) == 1   # part_seq from 0
    assert _rows(out, "parts") == 12
    logs = load_datalogs([folder])
    assert _rows(out, "results") == len(logs.results)
    assert_same_summary(parquet_summary(out, Selection()), summarise(logs))
    again = runner.invoke(main, ["export", str(folder), "--to", "parquet", str(out)])
    assert "12 parts (0 new), 0 results written" in again.output and _rows(out, "parts") == 12


def test_a_lot_rewritten_by_a_resume_replaces_its_pieces(tmp_path: Path) -> None:
    folder = make_datalog(tmp_path / "a", LotSpec(parts=12, tester_faults=0, retests=0))
    out = tmp_path / "history"
    runner = CliRunner()
    hold_back_last_index(folder)
    assert runner.invoke(main, ["export", str(folder), "--to", "parquet", str(out)]).exit_code == 0
    (folder / "in_progress.json").unlink()
    assert runner.invoke(main, ["export", str(folder), "--to", "parquet", str(out)]).exit_code == 0
    # A resume retested the last part: same id, a later end time, so the pieces no longer agree.
    lines = (folder / "parts.csv").read_text().splitlines(keepends=True)
    head, end_t = lines[-1].rsplit(",", 1)
    lines[-1] = f"{head},{float(end_t) + 60.0}\n"
    (folder / "parts.csv").write_text("".join(lines))
    third = runner.invoke(main, ["export", str(folder), "--to", "parquet", str(out)])
    assert third.exit_code == 0 and "12 parts (written)" in third.output, third.output
    assert len(list((out / "parts").rglob("*.parquet"))) == 1 and _rows(out, "parts") == 12
    assert len(list((out / "results").rglob("*.parquet"))) == 1
    assert_same_summary(parquet_summary(out, Selection()), summarise(load_datalogs([folder])))

"""`station summary --store`: the figures computed in SQL equal station/review/summary.py's over
the same folders (the folder summary is the reference here; its own figures are checked
against scipy and numpy in tests/review)."""

from __future__ import annotations

from pathlib import Path

import numpy as np
import pandas as pd
import pytest
from click.testing import CliRunner

from station.cli.main import main
from station.review.load import load_datalogs
from station.review.summary import Summary, summarise
from station.store.connect import connect
from station.store.engines import postgres_engine
from station.store.summary_sql import Selection, summarise_sql
from tests.support.review_datalogs import LotSpec, make_datalog


def assert_same_summary(got: Summary, want: Summary) -> None:
    for key, value in want.overview.items():
        if isinstance(value, float):
            assert got.overview[key] == pytest.approx(value, rel=1e-12, nan_ok=True), key
        else:
            assert got.overview[key] == value, key
    for name in ("grades", "hard_bins", "soft_bins", "pareto", "sites", "stats", "cpk", "by_table"):
        a, b = getattr(got, name), getattr(want, name)
        if b is None:
            assert a is None
            continue
        pd.testing.assert_frame_equal(a.reset_index(drop=True), b.reset_index(drop=True), check_dtype=False,
                                      rtol=1e-9, obj=name)
    assert got.site_test.method == want.site_test.method
    assert got.site_test.p_value == pytest.approx(want.site_test.p_value, nan_ok=True)
    assert got.grade_order == want.grade_order


@pytest.fixture(scope="module")
def floor(tmp_path_factory) -> list[Path]:
    base = tmp_path_factory.mktemp("floor")
    return [make_datalog(base / "a", LotSpec(parts=160, lot_id="LOT-1", station="bench-1", seed=1)),
            make_datalog(base / "b", LotSpec(parts=120, lot_id="LOT-2", station="bench-2", seed=2, bad_site=3,
                                             start_t=1_796_065_200.0)),
            make_datalog(base / "c", LotSpec(parts=80, lot_id="LOT-3", station="bench-1", seed=3, sites=2,
                                             start_t=1_796_070_000.0))]


@pytest.mark.parametrize("by", [None, "station", "site", "lot", "hour"])
def test_store_summary_equals_the_folder_summary(store: str, floor: list[Path], by: str | None) -> None:
    assert CliRunner().invoke(main, ["publish", *map(str, floor), "--store", store]).exit_code == 0
    want = summarise(load_datalogs(floor), by=by)
    with connect(store, autocommit=True) as conn:
        got = summarise_sql(postgres_engine(conn), Selection(), by=by)
    assert_same_summary(got, want)


def test_station_and_product_filters_match_the_folders_of_that_station(store: str, floor: list[Path]) -> None:
    assert CliRunner().invoke(main, ["publish", *map(str, floor), "--store", store]).exit_code == 0
    want = summarise(load_datalogs([floor[0], floor[2]]), by="lot")
    with connect(store, autocommit=True) as conn:
        got = summarise_sql(postgres_engine(conn), Selection(station="bench-1", product="PX-401"), by="lot")
        none = summarise_sql(postgres_engine(conn), Selection(product="no such product"))
    assert_same_summary(got, want)
    assert none.overview["parts tested"] == 0 and np.isnan(float(none.overview["yield"]))


def test_since_keeps_the_parts_that_ended_in_the_window(store: str, floor: list[Path]) -> None:
    assert CliRunner().invoke(main, ["publish", *map(str, floor), "--store", store]).exit_code == 0
    logs = load_datalogs(floor)
    cut = 1_796_070_000.0
    with connect(store, autocommit=True) as conn:
        got = summarise_sql(postgres_engine(conn), Selection(since_t=cut))
    expected = logs.parts[logs.parts["END_T"] >= cut]
    assert got.overview["parts tested"] == len(expected)
    assert got.overview["good"] == int((expected["PASS"] == 1).sum())


def test_summary_command_from_the_store(store: str, floor: list[Path]) -> None:
    runner = CliRunner()
    assert runner.invoke(main, ["publish", *map(str, floor), "--store", store]).exit_code == 0
    result = runner.invoke(main, ["summary", "--store", store, "--by", "station", "--since", "100000d"])
    assert result.exit_code == 0, result.output
    assert "Yield by station" in result.output and "bench-2" in result.output
    both = runner.invoke(main, ["summary", str(floor[0]), "--store", store])
    assert both.exit_code == 2 and "either" in both.output


def test_a_shift_keeps_the_parts_that_ended_inside_it(store: str, floor: list[Path], tmp_path: Path) -> None:
    # 19:30-21:00 in Vienna on 2026-11-30 is 18:30-20:00 UTC (CET = UTC+1, IANA tz database):
    # only lot LOT-2 (from 19:00 UTC) ended parts then.
    calendar = tmp_path / "shifts.yaml"
    calendar.write_text('time_zone: Europe/Vienna\nshifts:\n  evening: {start: "19:30", end: "21:00"}\n',
                        encoding="utf-8")
    runner = CliRunner()
    assert runner.invoke(main, ["publish", *map(str, floor), "--store", store]).exit_code == 0
    logs = load_datalogs(floor)
    start, end = 1_796_063_400.0, 1_796_068_800.0
    inside = logs.parts[(logs.parts["END_T"] >= start) & (logs.parts["END_T"] < end)]
    assert set(inside["LOT_ID"]) == {"LOT-2"}
    with connect(store, autocommit=True) as conn:
        got = summarise_sql(postgres_engine(conn), Selection(since_t=start, until_t=end))
    assert got.overview["parts tested"] == len(inside)
    assert got.overview["good"] == int((inside["PASS"] == 1).sum())
    assert_same_summary(got, summarise(load_datalogs([floor[1]])))

    table = tmp_path / "shift.csv"
    result = runner.invoke(main, ["summary", "--store", store, "--shift", "evening@2026-11-30", "--csv", str(table)],
                           env={"STATION_SHIFTS": str(calendar)})
    assert result.exit_code == 0, result.output
    assert "shift evening of 2026-11-30" in result.output
    figures = pd.read_csv(table)
    tested = figures[(figures["section"] == "overview") & (figures["key"] == "parts tested")]["value"]
    assert int(float(tested.iloc[0])) == len(inside)


def test_a_shift_needs_its_calendar_and_a_known_name(store: str, tmp_path: Path) -> None:
    runner = CliRunner()
    missing = runner.invoke(main, ["summary", "--store", store, "--shift", "night"], env={"STATION_SHIFTS": ""})
    assert missing.exit_code == 2 and "STATION_SHIFTS" in missing.output
    calendar = tmp_path / "shifts.yaml"
    calendar.write_text('time_zone: UTC\nshifts:\n  night: {start: "22:00", end: "06:00"}\n', encoding="utf-8")
    unknown = runner.invoke(main, ["summary", "--store", store, "--shift", "late", "--shifts", str(calendar)])
    assert unknown.exit_code == 2 and "its shifts: night" in unknown.output
    both = runner.invoke(main, ["summary", "--store", store, "--shift", "night", "--since", "8h",
                                "--shifts", str(calendar)])
    assert both.exit_code == 2 and "not both" in both.output


def test_yield_by_shift_from_the_store_equals_the_folders(store: str, floor: list[Path], tmp_path: Path) -> None:
    from station.config.shifts import parse_shift_calendar

    # Lot LOT-1 from 18:00 UTC, LOT-2 from 19:00, LOT-3 from 20:20: the shift change at 19:30
    # falls inside LOT-2, and 06:00-14:00 has no part.
    calendar = parse_shift_calendar('time_zone: UTC\nshifts:\n  late: {start: "14:00", end: "19:30"}\n'
                                    '  night: {start: "19:30", end: "06:00"}\n')
    assert CliRunner().invoke(main, ["publish", *map(str, floor), "--store", store]).exit_code == 0
    want = summarise(load_datalogs(floor), by="shift", shifts=calendar)
    assert want.by_table is not None
    assert want.by_table["shift"].tolist() == ["2026-11-30 14:00 late", "2026-11-30 19:30 night"]
    with connect(store, autocommit=True) as conn:
        got = summarise_sql(postgres_engine(conn), Selection(), by="shift", shifts=calendar)
    assert_same_summary(got, want)


def test_by_shift_on_folders_names_each_shift(floor: list[Path], tmp_path: Path) -> None:
    calendar = tmp_path / "shifts.yaml"
    calendar.write_text('time_zone: UTC\nshifts:\n  late: {start: "14:00", end: "19:30"}\n'
                        '  night: {start: "19:30", end: "06:00"}\n', encoding="utf-8")
    runner = CliRunner()
    result = runner.invoke(main, ["summary", *map(str, floor), "--by", "shift", "--shifts", str(calendar)])
    assert result.exit_code == 0, result.output
    assert "Yield by shift" in result.output and "2026-11-30 19:30 night" in result.output
    stray = runner.invoke(main, ["summary", *map(str, floor), "--shifts", str(calendar)])
    assert stray.exit_code == 2 and "--by shift" in stray.output

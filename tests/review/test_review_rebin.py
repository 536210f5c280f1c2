"""Re-binning a datalog offline: reproduces its own bins, moves exactly the parts a change moves."""

from __future__ import annotations

from pathlib import Path

import numpy as np
import pandas as pd
import pytest

from station.config.limit_tables import load_limit_table, parse_limit_table  # noqa: E402
from station.review.load import load_datalogs  # noqa: E402
from station.review.rebin import RebinError, move_matrix, rebin, write_parts_csv  # noqa: E402
from tests.support.review_datalogs import PX401_LIMITS, LotSpec, make_datalog  # noqa: E402

BIN_COLUMNS = ["HARD_BIN", "SOFT_BIN", "GRADE", "PASS", "FAIL_TEST"]


@pytest.fixture(scope="module")
def folder(tmp_path_factory) -> Path:
    return make_datalog(tmp_path_factory.mktemp("rebin") / "lot", LotSpec(parts=300, sites=4, seed=21, bad_site=2))


@pytest.fixture(scope="module")
def logs(folder):
    return load_datalogs([folder])


def _table_text(old: str, new: str) -> str:
    text = PX401_LIMITS.read_text()
    assert old in text
    return text.replace(old, new)


def test_before_is_parts_csv_and_own_limits_reproduce_every_bin(folder: Path, logs) -> None:
    result = rebin(logs, load_limit_table(folder / "limits.yaml"))
    logged = pd.read_csv(folder / "parts.csv")  # independent read of the file
    assert result.before["HARD_BIN"].tolist() == logged["HARD_BIN"].tolist()
    assert result.before["SOFT_BIN"].tolist() == logged["SOFT_BIN"].tolist()
    after = result.after.reset_index(drop=True)
    for column in BIN_COLUMNS:
        left = after[column].fillna(-1).tolist()
        right = logged[column].fillna("" if column == "GRADE" else -1).tolist()
        if column == "GRADE":
            left = [str(x) for x in after[column].fillna("")]
            right = [str(x) for x in right]
        assert left == right, column
    assert result.moved() == 0
    assert not result.regions_recomputed


def test_a_tightened_offset_limit_moves_exactly_the_parts_that_cross_it(folder: Path, logs) -> None:
    text = _table_text("{param: vos,       low: -50 uV, high: 50 uV,",
                       "{param: vos,       low: -30 uV, high: 30 uV,")
    result = rebin(logs, parse_limit_table(text, "tight.yaml"))
    results = pd.read_csv(folder / "results.csv")
    vos = results[results["PARAM"] == "vos"].copy()
    # Which logged grade-A parts cross the new +-30 uV: found from the raw CSV, by hand.
    before = result.before.set_index("PART_SEQ")
    after = result.after.set_index("PART_SEQ")
    vos["PART_SEQ"] = logs.results.loc[logs.results["PARAM"] == "vos", "PART_SEQ"].to_numpy()
    crossing = set(vos.loc[(vos["RESULT"].abs() > 30e-6) & (vos["RESULT"].abs() <= 50e-6), "PART_SEQ"])
    was_a = set(before.index[before["GRADE"] == "A"])
    moved = set(after.index[after["HARD_BIN"] != before["HARD_BIN"]])
    assert moved == crossing & was_a
    assert len(moved) > 0
    assert (after.loc[list(moved), "GRADE"] == "B").all()  # +-30 uV is still inside grade B's +-150 uV
    matrix = move_matrix(result)
    assert matrix.loc[1, 2] == len(moved)


def test_tightening_grade_b_fails_parts_to_the_offset_soft_bin(logs) -> None:
    text = _table_text("{param: vos,       low: -150 uV, high: 150 uV,",
                       "{param: vos,       low: -60 uV, high: 60 uV,")
    result = rebin(logs, parse_limit_table(text, "tight_b.yaml"))
    results = logs.results
    vos = results[results["PARAM"] == "vos"].set_index("PART_SEQ")["RESULT"]
    after = result.after.set_index("PART_SEQ")
    before = result.before.set_index("PART_SEQ")
    newly_failed = after.index[(after["PASS"] == 0) & (before["PASS"] == 1)]
    assert len(newly_failed) > 0
    assert (vos.loc[newly_failed].abs() > 60e-6).all()
    assert (after.loc[newly_failed, "SOFT_BIN"] == 11).all()
    assert (after.loc[newly_failed, "FAIL_TEST"] == 2001).all()


def test_contact_fails_and_tester_faults_keep_their_bins(logs) -> None:
    # A table whose contact rule would call every part an open: kept bins all the same.
    text = _table_text("open_below: 50 uA", "open_below: 5 uA")
    result = rebin(logs, parse_limit_table(text, "contact.yaml"))
    kept = result.before["HARD_BIN"].isin([6, 9])
    assert (result.after.loc[kept, "SOFT_BIN"] == result.before.loc[kept, "SOFT_BIN"]).all()
    assert (result.kept_contact, result.kept_faults) == (5, 3)


def test_a_moved_region_boundary_recomputes_cmrr_from_the_raw_points(logs) -> None:
    # Low region now ends at V+ - 2 V (3.0 V at the 10 V span) instead of V+ - 1.6 V (3.4 V).
    text = _table_text('to: "V+ - 1.6 V", kind: slope', 'to: "V+ - 2 V", kind: slope')
    text = text.replace('transition: {from: "V+ - 1.6 V"', 'transition: {from: "V+ - 2 V"')
    result = rebin(logs, parse_limit_table(text, "moved.yaml"))
    assert result.regions_recomputed
    raw = logs.results[logs.results["PARAM"] == "vos_cm"]
    figures = result.figures.set_index(["PART_SEQ", "PARAM", "REGION"])["RESULT"]
    checked = 0
    for seq, points in raw.groupby("PART_SEQ"):
        low = points[points["VCM"] < 3.0 - 1e-9]
        # Reference: numpy's least-squares line through the low-region points.
        slope = np.polyfit(low["VCM"].to_numpy(), low["RESULT"].to_numpy(), 1)[0]
        assert figures.loc[(seq, "cmrr_slope", "low")] == pytest.approx(slope, rel=1e-6, abs=1e-15)
        # CMRR_dB = -20 log10 |slope| (MIL-STD-883 TM 4003, from memory; docs/methods.md).
        assert figures.loc[(seq, "cmrr", "low")] == pytest.approx(-20 * np.log10(abs(slope)), rel=1e-9)
        step = points[(points["VCM"] >= 3.0 - 1e-9) & (points["VCM"] < 4.0 - 1e-9)]["RESULT"]
        assert figures.loc[(seq, "cm_step", "transition")] == pytest.approx(step.max() - step.min())
        checked += 1
    assert checked > 250
    # The logged low-region slope used the 3.3 V point too; the recomputed one must not.
    logged = logs.results[(logs.results["PARAM"] == "cmrr_slope") & (logs.results["REGION"] == "low")]
    logged = logged.set_index("PART_SEQ")["RESULT"]
    recomputed = figures.xs(("cmrr_slope", "low"), level=("PARAM", "REGION"))
    assert not np.allclose(logged.loc[recomputed.index].to_numpy(), recomputed.to_numpy(), rtol=1e-6, atol=0)


def test_a_region_the_sweep_cannot_fill_is_refused_in_one_line(logs) -> None:
    # A transition of 50 mV holds no sweep point at all.
    text = _table_text('to: "V+ - 1.6 V", kind: slope', 'to: "V+ - 1.05 V", kind: slope')
    text = text.replace('transition: {from: "V+ - 1.6 V"', 'transition: {from: "V+ - 1.05 V"')
    with pytest.raises(RebinError, match="region 'transition' has 0 common-mode points"):
        rebin(logs, parse_limit_table(text, "narrow.yaml"))


def test_out_writes_parts_csv_with_the_same_columns(folder: Path, logs, tmp_path: Path) -> None:
    text = _table_text("{param: vos,       low: -50 uV, high: 50 uV,",
                       "{param: vos,       low: -30 uV, high: 30 uV,")
    new = parse_limit_table(text, "tight.yaml")
    result = rebin(logs, new)
    target = write_parts_csv(result, folder, tmp_path / "out", new)
    written = pd.read_csv(target)
    logged = pd.read_csv(folder / "parts.csv")
    assert list(written.columns) == list(logged.columns)
    assert written["HARD_BIN"].tolist() == result.after["HARD_BIN"].tolist()
    for column in ("PART_ID", "SITE_NUM", "TEST_T", "END_T", "RETEST"):
        assert written[column].tolist() == logged[column].tolist()

"""The PAT limits a part was screened with, on every result row of each screened figure
(results.csv PAT_LO/PAT_HI) and in the STDF export's PTR limits; the baseline parts that
dynamic PAT re-checks at the lot end, marked in parts.csv (RESCREEN)."""

from __future__ import annotations

import json
from pathlib import Path
from typing import Any

import numpy as np
import pandas as pd
import pytest
from click.testing import CliRunner

from station.cli.main import main
from tests.screen.pat_support import pat_table_text
from tests.support.stdf_helpers import read_stdf

# Invented static window on the offset, tighter than the loosest grade's +-150 uV on its low
# side only, so a screened offset row shows the static low side and the dynamic high side.
STATIC = "  limits:\n    - {param: vos, low: -90 uV, high: 140 uV, soft_bin: 41, bin: PAT Offset}\n"
DYNAMIC = "  dynamic: {baseline: 30, sigma: 6, soft_bin: 49}\n"


def _f(text: str) -> float | None:
    return None if text == "" else float(text)


def _tighter(a: float | None, b: float | None, pick: Any) -> float | None:
    return b if a is None else a if b is None else pick(a, b)


def _f32(v: float | None) -> float | None:
    return None if v is None else float(np.float32(v))


def _window(limits: list[dict[str, Any]]) -> dict[tuple[str, str], tuple[float | None, float | None]]:
    out: dict[tuple[str, str], tuple[float | None, float | None]] = {}
    for lim in limits:
        key = (lim["param"], lim["region"] or "")
        low, high = out.get(key, (None, None))
        out[key] = (_tighter(low, lim["low"], max), _tighter(high, lim["high"], min))
    return out


@pytest.fixture(scope="module")
def lot(tmp_path_factory: pytest.TempPathFactory) -> dict[str, Any]:
    folder = tmp_path_factory.mktemp("pat_rows")
    limits = folder / "pat.yaml"
    limits.write_text(pat_table_text(STATIC + DYNAMIC))
    out = folder / "lot"
    result = CliRunner().invoke(main, ["dry-run", "--parts", "90", "--seed", "5", "--speed", "1000",
                                       "--limits", str(limits), "--inject-outliers", "0.05", "--out", str(out),
                                       "--lot", "PAT-ROWS", "--stdf"])
    assert result.exit_code == 0, result.output
    read = dict(dtype=str, keep_default_na=False)
    return {"out": out, "lot": json.loads((out / "lot.json").read_text()),
            "results": pd.read_csv(out / "results.csv", **read), "parts": pd.read_csv(out / "parts.csv", **read)}


def _expected_windows(lot: dict[str, Any]) -> dict[str, dict[tuple[str, str], tuple[float | None, float | None]]]:
    """Per screened part, the windows it met: the static ones always; the dynamic ones too
    once they exist, unless a static limit made it an outlier first (the baseline met none)."""
    pat, parts = lot["lot"]["pat"], lot["parts"]
    static, dynamic = pat["static"]["limits"], pat["dynamic"]["limits"]
    baseline = set(pat["dynamic"]["baseline_parts"])
    static_out = {o["part"] for o in pat["outliers"] if o["kind"] == "static"}
    screened = parts[(parts["PASS"] == "1") | (parts["HARD_BIN"] == "7")]["PART_ID"]
    return {pid: _window(static if pid in baseline or pid in static_out else static + dynamic)
            for pid in screened}


def test_every_row_of_a_screened_figure_carries_the_pat_window(lot: dict[str, Any]) -> None:
    results, pat = lot["results"], lot["lot"]["pat"]
    assert pat["dynamic"]["limits"] and pat["outliers"], "the run screens with dynamic limits and finds outliers"
    windows = _expected_windows(lot)
    checked = with_both = 0
    for row in results.itertuples(index=False):
        window = windows.get(row.PART_ID, {}).get((row.PARAM, row.REGION))
        if window is None:     # unscreened part or figure (a failed part, a raw sweep point)
            assert row.PAT_LO == "" and row.PAT_HI == "", row
            continue
        assert (_f(row.PAT_LO), _f(row.PAT_HI)) == window, row
        checked += 1
        with_both += row.PARAM == "vos" and row.PART_ID not in pat["dynamic"]["baseline_parts"]
    assert checked > 200 and with_both > 20
    # The deciding row of each outlier keeps the limit it broke, as before.
    for o in pat["outliers"]:
        row = results[(results["PART_ID"] == o["part"]) & (results["PARAM"] == o["param"])].iloc[0]
        assert row["GRADE"] == "PAT" and row["PASS"] == "0"
        assert (_f(row["LO_LIMIT"]), _f(row["HI_LIMIT"])) == (o["low"], o["high"])


def test_stdf_ptr_limits_are_the_tighter_of_the_grade_and_the_pat_window(lot: dict[str, Any]) -> None:
    # pystdf reads the file (the independent reader); a PTR's limits resolved by its OPT_FLAG
    # bits 4-7 against the first PTR of its test (STDF V4, from memory; see docs/stdf.md).
    ptrs = [r.fields for r in read_stdf(lot["out"] / "lot.stdf") if r.name == "Ptr"]
    results = lot["results"]
    assert len(ptrs) == len(results)
    first: dict[int, dict[str, Any]] = {}
    narrowed = 0
    for ptr, row in zip(ptrs, results.itertuples(index=False), strict=True):
        base = first.setdefault(ptr["TEST_NUM"], ptr)
        opt = ptr["OPT_FLAG"]
        lo = None if opt & 0x40 else (base["LO_LIMIT"] if opt & 0x10 else ptr["LO_LIMIT"])
        hi = None if opt & 0x80 else (base["HI_LIMIT"] if opt & 0x20 else ptr["HI_LIMIT"])
        want_lo = _tighter(_f(row.LO_LIMIT), _f(row.PAT_LO), max)
        want_hi = _tighter(_f(row.HI_LIMIT), _f(row.PAT_HI), min)
        assert (lo, hi) == (_f32(want_lo), _f32(want_hi)), row
        narrowed += (want_lo, want_hi) != (_f(row.LO_LIMIT), _f(row.HI_LIMIT))
    assert narrowed > 200


def test_parts_csv_marks_the_rechecked_baseline_and_the_folder_verifies(lot: dict[str, Any]) -> None:
    pat, parts = lot["lot"]["pat"], lot["parts"]
    baseline = pat["dynamic"]["baseline_parts"]
    listed = {r["part"] for r in pat["rescreen"]}
    assert len(baseline) == 30 and listed, "this seed puts an injected outlier in the baseline"
    marks = dict(zip(parts["PART_ID"], parts["RESCREEN"], strict=True))
    assert {pid: marks[pid] for pid in baseline} == {pid: "1" if pid in listed else "0" for pid in baseline}
    assert set(parts.loc[~parts["PART_ID"].isin(baseline), "RESCREEN"]) == {""}
    verify = CliRunner().invoke(main, ["verify", str(lot["out"])])
    assert verify.exit_code == 0, verify.output
    summary = CliRunner().invoke(main, ["summary", str(lot["out"])])
    assert "Re-screen list" in summary.output and sorted(listed)[0] in summary.output


def test_a_stopped_and_resumed_lot_marks_its_baseline_at_its_real_end(tmp_path: Path) -> None:
    from station.view.follow import PartsFollower
    from tests.support.review_datalogs import ROOT

    limits = tmp_path / "pat.yaml"
    limits.write_text(pat_table_text(DYNAMIC))
    seq = tmp_path / "seq.yaml"
    (tmp_path / "px401_apps.yaml").write_text((ROOT / "sequences" / "px401_apps.yaml").read_text())
    seq.write_text((ROOT / "sequences" / "px401_screen.yaml").read_text()
                   + "lot_control:\n  - {rule: consecutive_fails, count: 3, action: stop}\n")
    out = tmp_path / "lot"
    common = ["--sequence", str(seq), "--speed", "1000"]
    stopped = CliRunner().invoke(main, ["dry-run", "--parts", "80", "--seed", "5", "--limits", str(limits),
                                        "--inject-outliers", "0.05", "--out", str(out), "--lot", "PAT-RES",
                                        "--fixture-fault", "contact:2@50", *common])
    assert stopped.exit_code == 3, stopped.output
    follower = PartsFollower(out / "parts.csv")
    follower.poll()
    before = len(follower.rows)
    resumed = CliRunner().invoke(main, ["dry-run", "--resume", str(out), "--limits", str(limits), *common])
    assert resumed.exit_code == 0, resumed.output
    lot = json.loads((out / "lot.json").read_text())
    pat = lot["pat"]
    assert lot["complete"] is True and len(pat["dynamic"]["baseline_parts"]) == 30
    parts = pd.read_csv(out / "parts.csv", dtype=str, keep_default_na=False)
    listed = {r["part"] for r in pat["rescreen"]}
    marked = dict(zip(parts["PART_ID"], parts["RESCREEN"], strict=True))
    assert {p: marked[p] for p in pat["dynamic"]["baseline_parts"]} == \
        {p: "1" if p in listed else "0" for p in pat["dynamic"]["baseline_parts"]}
    assert (parts["RESCREEN"] != "").sum() == 30
    # the live page's follower sees the rewritten file whole (a new file), not a tail of it
    follower.poll()
    assert len(follower.rows) == len(parts) > before
    assert [row[-1] for row in follower.rows] == parts["RESCREEN"].tolist()
    verify = CliRunner().invoke(main, ["verify", str(out)])
    assert verify.exit_code == 0, verify.output

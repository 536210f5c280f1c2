"""Dynamic PAT in a lot (LotPat, without a bench), PAT in the rebin machinery, and `station pat`."""

from __future__ import annotations

from pathlib import Path

import numpy as np
import pytest
from click.testing import CliRunner

from station.cli.main import main
from station.config.limit_tables import parse_limit_table
from station.judge.grading import Result, grade_part
from station.review.load import load_datalogs
from station.review.rebin import rebin
from station.screen.dynamic_pat import LotPat
from station.screen.robust import window
from tests.screen.pat_support import pat_table_text
from tests.support.review_datalogs import LotSpec, make_datalog

DYNAMIC = "  dynamic: {baseline: 30, sigma: 6, soft_bin: 49, bin: Dynamic PAT outlier, params: [vos]}\n"


def _results(vos: float) -> list[Result]:
    """A part that takes grade B or better on every limit, with offset `vos`."""
    return [Result("iq", None, 450e-6, 1), Result("vos", None, vos, 2), Result("cmrr", "low", 130.0, 3),
            Result("cmrr", "high", 118.0, 4), Result("cm_step", "transition", 40e-6, 5),
            Result("vos_worst", "transition", 60e-6, 6), Result("cmrr", "full", 105.0, 7),
            Result("aol", None, 130.0, 8), Result("psrr", None, 130.0, 9),
            Result("ib", None, 2e-12, 10), Result("ios", None, 1e-12, 11)]


def test_baseline_limits_screen_later_parts_and_rescreen_the_baseline() -> None:
    table = parse_limit_table(pat_table_text(DYNAMIC))
    pat = LotPat(table)
    rng = np.random.default_rng(8)
    offsets = list(rng.normal(0.0, 15e-6, size=30))
    offsets[7] = 120e-6                                  # an in-spec outlier inside the baseline
    for n, vos in enumerate(offsets):
        verdict = grade_part(_results(vos), table)
        after, ready = pat.screen(f"P{n}", 1, verdict, _results(vos))
        assert after is verdict                          # the baseline is sorted as graded
        assert ready == (n == 29)
    w = window(offsets, 6)                               # median +- 6 IQR/1.35 of the 30 (numpy)
    [limit] = pat.limits or []
    assert (limit.low, limit.high) == pytest.approx((w.low, w.high))
    outlier = grade_part(_results(110e-6), table)
    assert outlier.passed and outlier.grade == "B"       # inside the spec: graded B
    after, _ = pat.screen("P30", 2, outlier, _results(110e-6))
    assert (after.hard_bin, after.soft_bin, after.passed, after.grade) == (7, 49, False, None)
    normal = grade_part(_results(3e-6), table)
    assert pat.screen("P31", 3, normal, _results(3e-6))[0] is normal
    assert [r["part"] for r in pat.rescreen()] == ["P7"]
    record = pat.lot_json(final=True)
    assert record["dynamic"]["from_part"] == "P30" and record["outliers"][0]["part"] == "P30"
    assert record["rescreen"][0]["part"] == "P7"
    # a resumed lot takes the limits and baseline back from lot.json
    again = LotPat(table)
    again.restore(record, {f"P{n}": (1, _results(v)) for n, v in enumerate(offsets)})
    assert again.limits == pat.limits and [r["part"] for r in again.rescreen()] == ["P7"]


def test_an_outlier_bin_marked_pass_ships_with_its_grade() -> None:
    text = pat_table_text(DYNAMIC).replace("7: {name: PAT outlier, pass: false}", "7: {name: PAT outlier, pass: true}")
    table = parse_limit_table(text)
    pat = LotPat(table, preset=[], preset_source="test")
    from station.config.limit_tables import Limit

    pat.limits = [Limit("vos", None, -50e-6, 50e-6, "V", 49, "Dynamic PAT outlier")]
    after, _ = pat.screen("P1", 1, grade_part(_results(90e-6), table), _results(90e-6))
    assert (after.hard_bin, after.passed, after.grade) == (7, True, "B")


def test_rebin_applies_a_tables_pat_layer_and_station_pat_lists_outliers(tmp_path: Path) -> None:
    folder = make_datalog(tmp_path / "lot", LotSpec(parts=200, seed=31))
    logs = load_datalogs([folder])
    good = logs.parts[logs.parts["PASS"] == 1]
    layer = "  limits:\n    - {param: vos, low: -20 uV, high: 20 uV, soft_bin: 41, bin: PAT Offset}\n"
    table = parse_limit_table(pat_table_text(layer))
    result = rebin(logs, table)
    vos = logs.results[logs.results["PARAM"] == "vos"].set_index("PART_SEQ")["RESULT"]
    expected = {int(s) for s in good["PART_SEQ"] if abs(vos[s]) > 20e-6}
    moved = set(result.after.loc[result.after["HARD_BIN"] == 7, "PART_SEQ"].astype(int))
    assert moved == expected and expected
    assert set(result.after.loc[result.after["HARD_BIN"] == 7, "SOFT_BIN"]) == {41}
    limits_file = tmp_path / "pat.yaml"
    limits_file.write_text(pat_table_text(DYNAMIC))
    out = CliRunner().invoke(main, ["pat", str(folder), "--limits", str(limits_file)])
    assert out.exit_code == 0, out.output
    assert "dynamic PAT limits at 6 robust sigma" in out.output and "would change bin" in out.output


def test_static_limits_of_the_table_screen_every_passing_part_in_the_lot() -> None:
    layer = "  limits:\n    - {param: vos, low: -60 uV, high: 60 uV, soft_bin: 41, bin: PAT Offset}\n"
    table = parse_limit_table(pat_table_text(layer))
    pat = LotPat(table)
    inside = grade_part(_results(59e-6), table)
    assert pat.screen("P1", 1, inside, _results(59e-6))[0] is inside
    after, _ = pat.screen("P2", 2, grade_part(_results(-61e-6), table), _results(-61e-6))
    assert (after.hard_bin, after.soft_bin, after.passed) == (7, 41, False)
    failed = grade_part(_results(200e-6), table)        # a spec fail stays a spec fail
    assert pat.screen("P3", 3, failed, _results(200e-6))[0] is failed
    assert [o["kind"] for o in pat.lot_json()["outliers"]] == ["static"]


def test_a_damaged_alarm_in_lot_json_is_refused(tmp_path: Path) -> None:
    import json

    from station.datalog.folder import DatalogError, read_lot_header

    folder = make_datalog(tmp_path / "lot", LotSpec(parts=20, seed=2))
    header = json.loads((folder / "lot.json").read_text())
    header["alarms"] = [{"rule": "x", "action": "explode", "site": 1, "message": "", "parts": [], "time": ""}]
    (folder / "lot.json").write_text(json.dumps(header))
    with pytest.raises(DatalogError, match="alarms"):
        read_lot_header(folder)

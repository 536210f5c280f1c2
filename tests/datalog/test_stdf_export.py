"""Datalog folder -> lot.stdf, read back with pystdf (the independent reader).

Expected values come from the hand-built CSVs (tests/support/stdf_helpers.py), re-read and counted
with pandas, never from the exporter. Flag meanings, record order and missing values: the
STDF V4 specification, from memory (as listed in docs/stdf.md); pystdf reads the file.
"""

from __future__ import annotations

import json
import math
from pathlib import Path
from typing import Any

import numpy as np
import pandas as pd
import pytest

from station.datalog.stdf_export import DatalogError, write_stdf
from tests.support.stdf_helpers import (
    END_T,
    HARD_BINS,
    INSTRUMENTS,
    LOT_ID,
    SCENARIO,
    SOFT_BINS,
    START_T,
    Part,
    make_datalog,
    of_type,
    part_rows,
    read_stdf,
)


@pytest.fixture(scope="module")
def lot(tmp_path_factory: pytest.TempPathFactory) -> dict[str, Any]:
    folder = make_datalog(tmp_path_factory.mktemp("lot") / "DL")
    path = write_stdf(folder)
    read = dict(dtype=str, keep_default_na=False)
    return {"folder": folder, "path": path, "records": read_stdf(path),
            "results": pd.read_csv(folder / "results.csv", **read),
            "parts": pd.read_csv(folder / "parts.csv", **read)}


def _f32(text: str) -> float:
    return float(np.float32(float(text)))


def _effective_limits(ptrs: list[dict[str, Any]]) -> list[tuple[float | None, float | None]]:
    """Each PTR's limits as a reader resolves them (OPT_FLAG bits 4-7, first PTR defaults)."""
    first: dict[int, dict[str, Any]] = {}
    out = []
    for ptr in ptrs:
        base = first.setdefault(ptr["TEST_NUM"], ptr)
        opt = ptr["OPT_FLAG"]
        lo = None if opt & 0x40 else (base["LO_LIMIT"] if opt & 0x10 else ptr["LO_LIMIT"])
        hi = None if opt & 0x80 else (base["HI_LIMIT"] if opt & 0x20 else ptr["HI_LIMIT"])
        out.append((lo, hi))
    return out


def _part_blocks(records: list[Any]) -> list[tuple[dict[str, Any], list[dict[str, Any]], dict]]:
    """(PIR, PTRs, PRR) per part, from the record stream."""
    blocks, current = [], None
    for rec in records:
        if rec.name == "Pir":
            assert current is None, "PIR inside an open part"
            current = (rec.fields, [])
        elif rec.name == "Ptr":
            assert current is not None, "PTR outside a part"
            current[1].append(rec.fields)
        elif rec.name == "Prr":
            assert current is not None, "PRR without PIR"
            blocks.append((current[0], current[1], rec.fields))
            current = None
    assert current is None
    return blocks


def test_record_order_and_counts(lot: dict[str, Any]) -> None:
    records, parts, results = lot["records"], lot["parts"], lot["results"]
    names = [r.name for r in records]
    assert names[:2] == ["Far", "Mir"] and names[-1] == "Mrr"
    assert names.count("Pir") == names.count("Prr") == len(parts)
    assert names.count("Ptr") == len(results)
    assert names.count("Dtr") == 1 + 3 + len(INSTRUMENTS)
    sites = results.groupby("SITE_NUM")["TEST_NUM"].nunique().sum()
    assert names.count("Tsr") == sites + results["TEST_NUM"].nunique()
    # Summaries follow the last part: TSR, HBR, SBR, PCR, then MRR.
    tail = names[len(names) - names[::-1].index("Prr"):]
    assert tail == sorted(tail, key=["Tsr", "Hbr", "Sbr", "Pcr", "Mrr"].index)
    n_sites = parts["SITE_NUM"].nunique()
    assert names.count("Pcr") == n_sites + 1
    for column, table, rec in (("HARD_BIN", HARD_BINS, "Hbr"), ("SOFT_BIN", SOFT_BINS, "Sbr")):
        per_site = parts.groupby("SITE_NUM")[column].nunique().sum()
        overall = len(set(parts[column]) | set(table))
        assert names.count(rec) == per_site + overall


def test_header_records(lot: dict[str, Any]) -> None:
    far = of_type(lot["records"], "Far")[0]
    assert far == {"CPU_TYPE": 2, "STDF_VER": 4}
    mir = of_type(lot["records"], "Mir")[0]
    meta = json.loads((lot["folder"] / "lot.json").read_text())
    assert mir["SETUP_T"] == mir["START_T"] == int(START_T)
    assert (mir["LOT_ID"], mir["PART_TYP"], mir["NODE_NAM"], mir["OPER_NAM"]) == (
        LOT_ID, meta["product"], meta["station"], meta["operator"])
    assert mir["MODE_COD"] == "D" and mir["STAT_NUM"] == 1  # dry run = development/debug
    assert mir["JOB_NAM"] == "px401_screen.yaml" and mir["SPEC_NAM"] == "px401.yaml"
    assert meta["sequence"]["sha256"].startswith(mir["JOB_REV"]) and len(mir["JOB_REV"]) >= 8
    assert meta["limits"]["sha256"].startswith(mir["SPEC_VER"]) and len(mir["SPEC_VER"]) >= 8
    assert (mir["EXEC_TYP"], mir["EXEC_VER"]) == ("ampscreen-station", "0.1.0")
    for key in ("sequence", "limits", "bench"):
        assert meta[key]["sha256"] in mir["USER_TXT"]
    texts = [d["TEXT_DAT"] for d in of_type(lot["records"], "Dtr")]
    for role, idn in INSTRUMENTS.items():
        assert any(role in t and idn in t for t in texts)
    mrr = of_type(lot["records"], "Mrr")[0]
    assert mrr["FINISH_T"] == int(END_T)


def test_every_ptr_matches_results_csv(lot: dict[str, Any]) -> None:
    ptrs, results = of_type(lot["records"], "Ptr"), lot["results"]
    limits = _effective_limits(ptrs)
    for ptr, (lo, hi), (_, row) in zip(ptrs, limits, results.iterrows(), strict=True):
        assert ptr["TEST_NUM"] == int(row["TEST_NUM"])
        assert (ptr["HEAD_NUM"], ptr["SITE_NUM"]) == (int(row["HEAD_NUM"]), int(row["SITE_NUM"]))
        assert ptr["RESULT"] == _f32(row["RESULT"])  # R4: float32 precision
        assert ptr["TEST_TXT"] == row["TEST_TXT"] and ptr["UNITS"] == row["UNITS"]
        assert lo == (None if row["LO_LIMIT"] == "" else _f32(row["LO_LIMIT"]))
        assert hi == (None if row["HI_LIMIT"] == "" else _f32(row["HI_LIMIT"]))
        assert bool(ptr["TEST_FLG"] & 0x80) == (row["PASS"] == "0")
        assert bool(ptr["TEST_FLG"] & 0x40) == (row["PASS"] == "")
        assert bool(ptr["TEST_FLG"] & 0x02) == (not math.isfinite(float(row["RESULT"])))
        assert ptr["PARM_FLG"] & 0xC0 == 0xC0  # inclusive limits: equal passes
        scale = {"V": 6, "A": 6, "dB": 0}[row["UNITS"]]
        assert ptr["RES_SCAL"] == ptr["LLM_SCAL"] == ptr["HLM_SCAL"] == scale


def test_every_prr_matches_parts_csv(lot: dict[str, Any]) -> None:
    blocks = _part_blocks(lot["records"])
    for (pir, ptrs, prr), (_, row), part in zip(blocks, lot["parts"].iterrows(), SCENARIO,
                                                strict=True):
        assert (pir["HEAD_NUM"], pir["SITE_NUM"]) == (prr["HEAD_NUM"], prr["SITE_NUM"])
        assert prr["SITE_NUM"] == int(row["SITE_NUM"])
        assert prr["PART_ID"] == row["PART_ID"]
        assert (prr["HARD_BIN"], prr["SOFT_BIN"]) == (int(row["HARD_BIN"]), int(row["SOFT_BIN"]))
        assert prr["NUM_TEST"] == len(ptrs) == len(part_rows(part))
        assert all(p["SITE_NUM"] == prr["SITE_NUM"] for p in ptrs)
        assert prr["TEST_T"] == round(float(row["TEST_T"]))
        flags = prr["PART_FLG"]
        assert bool(flags & 0x01) == (row["RETEST"] == "1")
        assert bool(flags & 0x08) == (row["PASS"] == "0")
        assert bool(flags & 0x10) == bool(flags & 0x04) == (row["PASS"] == "")


def _ptr_of(lot: dict[str, Any], index: int, test_num: int) -> dict[str, Any]:
    """The PTR of `test_num` in the part at position `index` of parts.csv."""
    _, ptrs, _ = _part_blocks(lot["records"])[index]
    return next(p for p in ptrs if p["TEST_NUM"] == test_num)


def test_flag_cases_by_hand(lot: dict[str, Any]) -> None:
    # High fail: P03 (index 2), Vos 250 uV > 100 uV: failed, above high limit.
    vos = _ptr_of(lot, 2, 2001)
    assert (vos["TEST_FLG"], vos["PARM_FLG"]) == (0x80, 0xC0 | 0x08)
    # Low fail: P04 (index 3), CMRR 100 dB < 110 dB: failed, below low limit.
    cmrr = _ptr_of(lot, 3, 3001)
    assert (cmrr["TEST_FLG"], cmrr["PARM_FLG"]) == (0x80, 0xC0 | 0x10)
    # No low limit (CM step, first PTR): bit 6; reserved bit 1; no spec limits bits 2, 3.
    assert _ptr_of(lot, 0, 4001)["OPT_FLAG"] == 0x02 | 0x04 | 0x08 | 0x40
    assert _ptr_of(lot, 0, 3001)["OPT_FLAG"] == 0x02 | 0x04 | 0x08 | 0x80  # no high limit
    raw = _ptr_of(lot, 0, 4101)  # raw point: no limits, no pass/fail indication
    assert raw["OPT_FLAG"] == 0x02 | 0x04 | 0x08 | 0x40 | 0x80 and raw["TEST_FLG"] == 0x40
    # Over-range: P06 (index 7), Vos inf: RESULT not valid, failed, above high.
    over = _ptr_of(lot, 7, 2001)
    assert over["RESULT"] == math.inf and over["TEST_FLG"] == 0x80 | 0x02
    assert over["PARM_FLG"] & 0x08
    # A grade-B part carries its own limits; a later grade-A part uses the first PTR's.
    own = _ptr_of(lot, 1, 2001)
    assert own["OPT_FLAG"] & 0x30 == 0 and own["LO_LIMIT"] == _f32("-0.0001")
    assert _ptr_of(lot, 5, 2001)["OPT_FLAG"] & 0x30 == 0x30
    blocks = _part_blocks(lot["records"])
    # Tester fault: P05 (index 4): abnormal end, no pass/fail indication, no PTRs.
    _, ptrs, prr = blocks[4]
    assert (prr["PART_FLG"], prr["NUM_TEST"], ptrs) == (0x04 | 0x10, 0, [])
    # Retested parts: P05 after its fault, P03 again on the same site: retest bit only.
    assert blocks[5][2]["PART_FLG"] == 0x01 and blocks[5][2]["PART_ID"] == "P05"
    assert blocks[6][2]["PART_FLG"] == 0x01 and blocks[6][2]["SOFT_BIN"] == 2


def test_test_synopsis_counts(lot: dict[str, Any]) -> None:
    results = lot["results"]
    for tsr in of_type(lot["records"], "Tsr"):
        rows = results[results["TEST_NUM"] == str(tsr["TEST_NUM"])]
        if tsr["HEAD_NUM"] != 255:
            rows = rows[rows["SITE_NUM"] == str(tsr["SITE_NUM"])]
        assert tsr["TEST_TYP"] == "P"
        assert tsr["EXEC_CNT"] == len(rows)
        assert tsr["FAIL_CNT"] == (rows["PASS"] == "0").sum()
        finite = [v for v in rows["RESULT"].astype(float) if math.isfinite(v)]
        assert tsr["TEST_MIN"] == np.float32(min(finite))
        assert tsr["TEST_MAX"] == np.float32(max(finite))
        assert tsr["TEST_NAM"] == rows["TEST_TXT"].iloc[0]


def test_bin_and_part_counts(lot: dict[str, Any]) -> None:
    parts = lot["parts"]
    for column, table, rec, prefix in (("HARD_BIN", HARD_BINS, "Hbr", "HBIN"),
                                       ("SOFT_BIN", SOFT_BINS, "Sbr", "SBIN")):
        site_counts = parts.groupby(["SITE_NUM", column]).size()
        lot_counts = parts.groupby(column).size()
        seen = set()
        for rec_fields in of_type(lot["records"], rec):
            number = str(rec_fields[f"{prefix}_NUM"])
            if rec_fields["HEAD_NUM"] == 255:
                expected = int(lot_counts.get(number, 0))
            else:
                expected = int(site_counts[(str(rec_fields["SITE_NUM"]), number)])
            assert rec_fields[f"{prefix}_CNT"] == expected, (rec, number)
            info = table[number]
            assert rec_fields[f"{prefix}_NAM"] == info["name"]
            assert rec_fields[f"{prefix}_PF"] == ("P" if info["pass"] else "F")
            seen.add((rec_fields["HEAD_NUM"], number))
        assert {n for h, n in seen if h == 255} == set(table) | set(parts[column])
    for pcr in of_type(lot["records"], "Pcr"):
        rows = parts if pcr["HEAD_NUM"] == 255 else parts[parts["SITE_NUM"] == str(pcr["SITE_NUM"])]
        assert pcr["PART_CNT"] == len(rows)
        assert pcr["RTST_CNT"] == (rows["RETEST"] == "1").sum()
        assert pcr["ABRT_CNT"] == (rows["PASS"] == "").sum()
        assert pcr["GOOD_CNT"] == (rows["PASS"] == "1").sum()


def test_conversion_is_deterministic(tmp_path: Path) -> None:
    first = write_stdf(make_datalog(tmp_path / "a"))
    again = write_stdf(tmp_path / "a", tmp_path / "again.stdf")
    elsewhere = write_stdf(make_datalog(tmp_path / "b" / "other-name"))
    assert first.read_bytes() == again.read_bytes() == elsewhere.read_bytes()
    assert first == tmp_path / "a" / "lot.stdf"


def test_production_mode_and_incomplete_lot(tmp_path: Path) -> None:
    folder = make_datalog(tmp_path / "run", scenario=SCENARIO[:2], mode="run")
    meta = json.loads((folder / "lot.json").read_text())
    meta["complete"] = False
    del meta["end_t"]  # the lot never ended
    (folder / "lot.json").write_text(json.dumps(meta))
    records = read_stdf(write_stdf(folder))
    assert of_type(records, "Mir")[0]["MODE_COD"] == "P"
    mrr = of_type(records, "Mrr")[0]
    assert mrr["FINISH_T"] == int(START_T + 10.0)  # END_T of the last part
    assert "not complete" in mrr["EXC_DESC"]


def test_unreadable_folders_are_clear_errors(tmp_path: Path) -> None:
    with pytest.raises(DatalogError, match="lot.json"):
        write_stdf(tmp_path)
    folder = make_datalog(tmp_path / "x", scenario=[Part("Q1", 1, {}, hard=7, soft=90)])
    extra = "T-LOT-7,Q9,1,1,1001,Iq contact,contact_iq,,0.0,,0.00045,A,,,,B\n"
    with (folder / "results.csv").open("a") as handle:
        handle.write(extra)
    with pytest.raises(DatalogError, match="Q9"):
        write_stdf(folder)
    (folder / "parts.csv").write_text("LOT_ID,PART_ID\n")
    with pytest.raises(DatalogError, match="missing column"):
        write_stdf(folder)

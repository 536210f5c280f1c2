"""Hand-built datalog folders (per docs/datalog-format.md) and an independent STDF reader.

The folder is written here with the csv module, never by the station's own datalog writer,
so the export is tested against the documented format, not against another of our modules.
"""

from __future__ import annotations

import csv
import hashlib
import json
from dataclasses import dataclass, field
from pathlib import Path
from typing import Any

RESULT_COLUMNS = ["LOT_ID", "PART_ID", "HEAD_NUM", "SITE_NUM", "TEST_NUM", "TEST_TXT", "PARAM",
                  "REGION", "VCM", "COND", "RESULT", "UNITS", "LO_LIMIT", "HI_LIMIT", "PASS",
                  "GRADE"]
PART_COLUMNS = ["LOT_ID", "PART_ID", "HEAD_NUM", "SITE_NUM", "HARD_BIN", "SOFT_BIN", "GRADE",
                "PASS", "TEST_T", "RETEST", "FAIL_TEST", "FAULT", "END_T"]

LOT_ID = "T-LOT-7"
START_T = 1796061600.0
END_T = 1796061670.5

# The invented sequence: (TEST_NUM, TEST_TXT, PARAM, REGION, UNITS).
TESTS = [
    (1001, "Iq contact", "contact_iq", "", "A"),          # raw, no limits
    (2001, "Vos", "vos", "", "V"),                        # low and high limit
    (3001, "CMRR low region", "cmrr", "low", "dB"),       # low limit only
    (4001, "CM step transition", "cm_step", "transition", "V"),  # high limit only
    (4101, "Vos at VCM -5.100 V", "vos_cm", "", "V"),     # raw point, no limits
]
# Limits per grade (A best first, B loosest): TEST_NUM -> (LO_LIMIT, HI_LIMIT).
LIMITS = {
    "A": {2001: (-50e-6, 50e-6), 3001: (120.0, None), 4001: (None, 150e-6)},
    "B": {2001: (-100e-6, 100e-6), 3001: (110.0, None), 4001: (None, 300e-6)},
}
HARD_BINS = {"1": {"name": "Grade A", "pass": True}, "2": {"name": "Grade B", "pass": True},
             "5": {"name": "Reject", "pass": False}, "7": {"name": "Tester fault", "pass": False}}
SOFT_BINS = {"1": {"name": "Grade A", "pass": True}, "2": {"name": "Grade B", "pass": True},
             "12": {"name": "Vos", "pass": False}, "13": {"name": "CMRR low region", "pass": False},
             "14": {"name": "CM step", "pass": False}, "90": {"name": "Tester fault", "pass": False}}
INSTRUMENTS = {"supply": "AMPSCREEN-SIM,ASP-2215,0001,1.0", "dmm1": "AMPSCREEN-SIM,ASM-65,0002,1.0"}
FILE_TEXTS = {"sequence.yaml": "tests: [iq, vos, cmrr]\n", "limits.yaml": "grades: [A, B]\n",
              "bench.yaml": "sites: 2\n"}


@dataclass
class Part:
    """One part of the scenario: its parts.csv fields and measured values per TEST_NUM."""

    part_id: str
    site: int
    values: dict[int, float] = field(default_factory=dict)  # empty: tester fault
    grade: str = ""        # grade of a passing part; the decided grade's limits are logged
    fail_test: int | None = None
    retest: bool = False
    fault: str = ""
    hard: int = 0
    soft: int = 0


def _values(vos: float, cmrr: float = 130.0, step: float = 40e-6, iq: float = 4.5e-4,
            vcm: float = -12e-6) -> dict[int, float]:
    return {1001: iq, 2001: vos, 3001: cmrr, 4001: step, 4101: vcm}


# Passing parts of two grades, a high fail, a low fail, a tester fault and its retest,
# a retest of a failed part on the same site, an over-range (inf) result; two sites.
SCENARIO = [
    Part("P01", 1, _values(12e-6), grade="A", hard=1, soft=1),
    Part("0042", 2, _values(80e-6, cmrr=125.0), grade="B", hard=2, soft=2),
    Part("P03", 1, _values(250e-6), fail_test=2001, hard=5, soft=12),
    Part("P04", 2, _values(-20e-6, cmrr=100.0), fail_test=3001, hard=5, soft=13),
    Part("P05", 1, {}, fault="dmm1: timeout on READ?", hard=7, soft=90),
    Part("P05", 1, _values(-5e-6, step=10e-6), grade="A", retest=True, hard=1, soft=1),
    Part("P03", 1, _values(-70e-6, step=200e-6), grade="B", retest=True, hard=2, soft=2),
    Part("P06", 2, _values(float("inf")), fail_test=2001, hard=5, soft=12),
]


def _cell(value: float | None) -> str:
    return "" if value is None else repr(value)


def _passes(value: float, lo: float | None, hi: float | None) -> bool:
    return (lo is None or value >= lo) and (hi is None or value <= hi)


def part_rows(part: Part) -> list[dict[str, str]]:
    """results.csv rows of one part: limits of its grade, or of the loosest for a fail."""
    grade = part.grade or "B"
    rows = []
    for number, text, param, region, units in TESTS:
        if number not in part.values:
            continue
        value = part.values[number]
        lo, hi = LIMITS[grade].get(number, (None, None))
        limited = lo is not None or hi is not None
        rows.append({
            "LOT_ID": LOT_ID, "PART_ID": part.part_id, "HEAD_NUM": "1",
            "SITE_NUM": str(part.site), "TEST_NUM": str(number), "TEST_TXT": text,
            "PARAM": param, "REGION": region, "VCM": "0.0", "COND": "", "RESULT": repr(value),
            "UNITS": units, "LO_LIMIT": _cell(lo), "HI_LIMIT": _cell(hi),
            "PASS": ("1" if _passes(value, lo, hi) else "0") if limited else "",
            "GRADE": grade,
        })
    return rows


def _part_row(part: Part, index: int) -> dict[str, str]:
    fault = not part.values
    return {
        "LOT_ID": LOT_ID, "PART_ID": part.part_id, "HEAD_NUM": "1", "SITE_NUM": str(part.site),
        "HARD_BIN": str(part.hard), "SOFT_BIN": str(part.soft), "GRADE": part.grade,
        "PASS": "" if fault else ("1" if part.grade else "0"),
        "TEST_T": repr(850.0 + 10.25 * index), "RETEST": "1" if part.retest else "0",
        "FAIL_TEST": "" if part.fail_test is None else str(part.fail_test), "FAULT": part.fault,
        "END_T": repr(START_T + 5.0 * (index + 1)),
    }


def _write_csv(path: Path, columns: list[str], rows: list[dict[str, str]]) -> None:
    with path.open("w", newline="", encoding="utf-8") as handle:
        writer = csv.DictWriter(handle, fieldnames=columns, lineterminator="\n")
        writer.writeheader()
        writer.writerows(rows)


def make_datalog(folder: Path, scenario: list[Part] | None = None, mode: str = "dry-run") -> Path:
    """Write results.csv, parts.csv, lot.json and the three YAML copies into `folder`."""
    scenario = SCENARIO if scenario is None else scenario
    folder.mkdir(parents=True, exist_ok=True)
    for name, text in FILE_TEXTS.items():
        (folder / name).write_text(text, encoding="utf-8")
    _write_csv(folder / "results.csv", RESULT_COLUMNS,
               [row for part in scenario for row in part_rows(part)])
    _write_csv(folder / "parts.csv", PART_COLUMNS,
               [_part_row(part, i) for i, part in enumerate(scenario)])

    def entry(kind: str, source: str) -> dict[str, str]:
        data = FILE_TEXTS[f"{kind}.yaml"].encode()
        return {"file": f"{kind}.yaml", "source": source, "sha256": hashlib.sha256(data).hexdigest()}

    lot: dict[str, Any] = {
        "format": "ampscreen-datalog/1", "lot_id": LOT_ID, "station": "bench-3",
        "operator": "demo", "mode": mode, "product": "PX-401",
        "sequence": entry("sequence", "/cfg/px401_screen.yaml"),
        "limits": entry("limits", "/cfg/px401.yaml"),
        "bench": entry("bench", "/cfg/sim_bench.yaml"),
        "software": {"name": "ampscreen-station", "version": "0.1.0"},
        "instruments": INSTRUMENTS, "sites": 2, "head": 1,
        "start_t": START_T, "end_t": END_T, "complete": True, "parts_tested": len(scenario),
        "hard_bins": HARD_BINS, "soft_bins": SOFT_BINS,
        "tests": [{"test_num": n, "test_txt": t, "param": p, "region": r, "units": u}
                  for n, t, p, r, u in TESTS],
    }
    (folder / "lot.json").write_text(json.dumps(lot, indent=2), encoding="utf-8")
    return folder


@dataclass
class StdfRecord:
    name: str          # record type, e.g. "Ptr"
    fields: dict[str, Any]


def read_stdf(path: Path) -> list[StdfRecord]:
    """All records of an STDF file, read by pystdf (the independent reader)."""
    from pystdf.IO import Parser  # tests only: the station never imports pystdf

    records: list[StdfRecord] = []

    class Collect:
        def after_send(self, source: object, data: tuple[Any, list[Any]]) -> None:
            rec_type, values = data
            records.append(StdfRecord(type(rec_type).__name__,
                                      dict(zip(rec_type.fieldNames, values, strict=True))))

    with path.open("rb") as handle:
        parser = Parser(inp=handle)
        parser.addSink(Collect())
        parser.parse()
    return records


def of_type(records: list[StdfRecord], name: str) -> list[dict[str, Any]]:
    return [r.fields for r in records if r.name == name]

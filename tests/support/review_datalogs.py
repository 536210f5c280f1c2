"""Test support: small datalog folders written by hand per docs/datalog-format.md.

Parts get random but seeded figures: raw Vos at each common-mode point from a known offset,
slope per input pair and crossover step, computed figures from the station's pure math
(station.judge.measure), and bins from station.judge.grading under the limit table given, just as the
station would log them. Options make one site worse, add tester faults, contact fails and
retests, so the review tools have every kind of row to read.
"""

from __future__ import annotations

import csv
import hashlib
import json
from dataclasses import dataclass
from datetime import UTC, datetime
from pathlib import Path

import numpy as np

from station.config.limit_tables import LimitTable, parse_limit_table
from station.judge import grading, measure

ROOT = Path(__file__).resolve().parents[2]
PX401_LIMITS = ROOT / "limits" / "px401.yaml"
SPAN_V = 10.0

# Sweep points (VCM, mid-referenced) at a 10 V span: 5 in the low region, 3 in the
# transition (V+ - 1.6 V .. V+ - 1.0 V is 3.4 .. 4.0 V), 3 in the high region.
CM_POINTS = (-5.1, -2.5, 0.0, 2.5, 3.3, 3.5, 3.7, 3.9, 4.0, 4.5, 5.1)
FORCE_LEVELS = (-4.0, 0.0, 4.0)
SPANS = (9.0, 10.0, 11.0)
RESULT_COLUMNS = ["LOT_ID", "PART_ID", "HEAD_NUM", "SITE_NUM", "TEST_NUM", "TEST_TXT", "PARAM", "REGION",
                  "VCM", "COND", "RESULT", "UNITS", "LO_LIMIT", "HI_LIMIT", "PASS", "GRADE"]
PART_COLUMNS = ["LOT_ID", "PART_ID", "HEAD_NUM", "SITE_NUM", "HARD_BIN", "SOFT_BIN", "GRADE", "PASS",
                "TEST_T", "RETEST", "FAIL_TEST", "FAULT", "END_T"]


@dataclass
class LotSpec:
    parts: int = 300
    sites: int = 4
    seed: int = 1
    lot_id: str = "LOT-T1"
    station: str = "bench-1"
    bad_site: int | None = None       # this site's parts get a wide offset spread
    tester_faults: int = 3
    opens: int = 3
    shorts: int = 2
    retests: int = 4                  # failed parts tested again at the end
    start_t: float = 1_796_061_600.0  # 2026-11-30 18:00:00 UTC
    index_s: float = 2.0              # one index (all sites) takes this long
    limits_text: str | None = None    # default: limits/px401.yaml


def cell(value: object) -> str:
    if value is None:
        return ""
    if isinstance(value, bool):
        return "1" if value else "0"
    if isinstance(value, float):
        return repr(value)
    return str(value)


def draw_part(rng: np.random.Generator, wide_offset: bool) -> dict[str, float]:
    """True parameters of one part (invented population, in the style of docs/methods.md,
    "The invented demo population")."""
    return {
        "vos": rng.normal(0.0, 110e-6 if wide_offset else 15e-6),
        "slope_low": rng.normal(0.0, 0.3e-6),
        "slope_high": rng.normal(0.0, 1.5e-6),
        "step": rng.normal(0.0, 60e-6),
        "aol": 3e6 * 10 ** (rng.normal(0.0, 2.0) / 20.0),
        "psrr_slope": rng.normal(0.0, 0.3e-6),
        "iq": rng.normal(450e-6, 25e-6),
    }


def vos_curve(true: dict[str, float], vcm: np.ndarray) -> np.ndarray:
    """Offset versus common mode: low-pair line, a linear hand-over 3.4..4.0 V, high-pair line."""
    low = true["vos"] + true["slope_low"] * vcm
    high = true["vos"] + true["step"] + true["slope_high"] * (vcm - 4.0)
    blend = np.clip((vcm - 3.4) / 0.6, 0.0, 1.0)
    return (1 - blend) * low + blend * high


def part_rows(true: dict[str, float], table: LimitTable, rng: np.random.Generator) -> list[tuple]:
    """(test_num, text, param, region, vcm, cond, value, units) in execution order."""
    rows: list[tuple] = [(1001, "Iq contact check", "contact_iq", None, 0.0, None, true["iq"], "A")]
    rows.append((2001, "Vos at nominal supply", "vos", None, 0.0, None, true["vos"], "V"))
    vcm = np.array(CM_POINTS)
    vos = vos_curve(true, vcm) + rng.normal(0.0, 0.05e-6, len(vcm))
    for i, (x, y) in enumerate(zip(vcm, vos, strict=True)):
        rows.append((3101 + i, f"Vos at VCM {x:+.3f} V", "vos_cm", measure.region_of(x, table.regions, SPAN_V),
                     float(x), None, float(y), "V"))
    figures = measure.cmrr_figures(vcm.tolist(), vos.tolist(), table.regions, SPAN_V)
    for i, f in enumerate(figures):
        rows.append((3001 + i, f"{f.param} {f.region}", f.param, f.region, None, None, f.value, f.units))
    levels = np.array(FORCE_LEVELS)
    vos_force = true["vos"] - levels / true["aol"]
    for i, (x, y) in enumerate(zip(levels, vos_force, strict=True)):
        rows.append((4101 + i, f"Vos at Vout {x:+g} V", "vos_force", None, 0.0, float(x), float(y), "V"))
    for i, f in enumerate(measure.aol_figures(levels.tolist(), vos_force.tolist())):
        rows.append((4001 + i, f.param, f.param, None, 0.0, None, f.value, f.units))
    spans = np.array(SPANS)
    vos_span = true["vos"] + true["psrr_slope"] * (spans - SPAN_V)
    for i, (x, y) in enumerate(zip(spans, vos_span, strict=True)):
        rows.append((5101 + i, f"Vos at span {x:g} V", "vos_span", None, 0.0, float(x), float(y), "V"))
    for i, f in enumerate(measure.psrr_figures(spans.tolist(), vos_span.tolist())):
        rows.append((5001 + i, f.param, f.param, None, 0.0, None, f.value, f.units))
    rows.append((6001, "Iq at nominal supply", "iq", None, 0.0, None, true["iq"], "A"))
    # Bias currents (invented, a few pA) from a generator of their own, so that every figure
    # above keeps the values it had before these rows existed.
    ib_rng = np.random.default_rng(int(abs(true["iq"]) * 1e18) % (1 << 62))
    ib_plus, ib_minus = (float(v) for v in 2e-12 + ib_rng.normal(0.0, 0.3e-12, 2))
    for i, f in enumerate(measure.bias_figures(0.0, ib_plus * 1e8, -ib_minus * 1e8, (ib_plus - ib_minus) * 1e8, 1e8)):
        rows.append((7001 + i, f.param, f.param, None, 0.0, None, f.value, f.units))
    return rows


def to_results(rows: list[tuple]) -> list[grading.Result]:
    raw = {"vos_cm", "vos_force", "vos_span"}
    return [grading.Result(r[2], r[3], r[6], r[0]) for r in rows if r[2] not in raw]


def make_datalog(folder: Path, spec: LotSpec | None = None) -> Path:
    """Write a datalog folder; returns it."""
    spec = spec or LotSpec()
    folder.mkdir(parents=True, exist_ok=True)
    limits_text = spec.limits_text if spec.limits_text is not None else PX401_LIMITS.read_text()
    (folder / "limits.yaml").write_text(limits_text)
    table = parse_limit_table(limits_text, str(folder / "limits.yaml"))
    rng = np.random.default_rng(spec.seed)
    plan = _plan(spec, rng)
    results_file = open(folder / "results.csv", "w", newline="")
    parts_file = open(folder / "parts.csv", "w", newline="")
    results_csv, parts_csv = csv.writer(results_file), csv.writer(parts_file)
    results_csv.writerow(RESULT_COLUMNS)
    parts_csv.writerow(PART_COLUMNS)
    end_t = spec.start_t
    hard_counts: dict[int, int] = {}
    soft_counts: dict[int, int] = {}
    for n, (part_id, site, kind, retest) in enumerate(plan):
        if n % spec.sites == 0:
            end_t += spec.index_s
        true = draw_part(rng, wide_offset=site == spec.bad_site)
        rows: list[tuple] = []
        limits: dict[tuple[str, str | None], tuple] = {}
        if kind == "fault":
            verdict = grading.tester_fault_verdict(table, "dmm1 timeout")
        elif kind in ("open", "short"):
            iq = 1e-6 if kind == "open" else 8e-3
            rows = [(1001, "Iq contact check", "contact_iq", None, 0.0, None, iq, "A")]
            verdict = grading.contact_verdict(grading.contact_state(iq, table), table)
        else:
            rows = part_rows(true, table, rng)
            verdict = grading.grade_part(to_results(rows), table)
            for check in verdict.checks:
                if check.limit is not None:
                    limits[(check.result.param, check.result.region)] = (
                        check.limit.low, check.limit.high, check.passed)
        for r in rows:
            low, high, passed = limits.get((r[2], r[3]), (None, None, None))
            results_csv.writerow([cell(v) for v in (
                spec.lot_id, part_id, 1, site, r[0], r[1], r[2], r[3] or "", r[4], r[5], float(r[6]), r[7],
                low, high, passed, verdict.decided_by if rows else None)])
        fail_test = verdict.failing.result.test_num if verdict.failing is not None else None
        if kind in ("open", "short"):
            fail_test = 1001
        parts_csv.writerow([cell(v) for v in (
            spec.lot_id, part_id, 1, site, verdict.hard_bin, verdict.soft_bin, verdict.grade, verdict.passed,
            int(rng.integers(700, 900)), retest, fail_test, "dmm1: timeout" if kind == "fault" else "",
            round(end_t, 3))])
        hard_counts[verdict.hard_bin] = hard_counts.get(verdict.hard_bin, 0) + 1
        soft_counts[verdict.soft_bin] = soft_counts.get(verdict.soft_bin, 0) + 1
    results_file.close()
    parts_file.close()
    _write_lot(folder, spec, table, limits_text, end_t, hard_counts, soft_counts, len(plan))
    return folder


def _plan(spec: LotSpec, rng: np.random.Generator) -> list[tuple[str, int, str, bool]]:
    """(part id, site, kind, retest) per insertion; kinds: good-or-fail 'part', 'open', 'short', 'fault'."""
    kinds = ["part"] * spec.parts
    specials = rng.choice(spec.parts, size=spec.tester_faults + spec.opens + spec.shorts, replace=False)
    for i, index in enumerate(specials):
        kinds[index] = "fault" if i < spec.tester_faults else "open" if i < spec.tester_faults + spec.opens else "short"
    plan = [(f"P{i + 1:05d}", i % spec.sites + 1, kinds[i], False) for i in range(spec.parts)]
    # Retests: a few parts tested again at the end (the same id, maybe another site).
    for j, index in enumerate(rng.choice(spec.parts, size=spec.retests, replace=False)):
        plan.append((plan[index][0], (spec.parts + j) % spec.sites + 1, "part", True))
    return plan


def _write_lot(folder: Path, spec: LotSpec, table: LimitTable, limits_text: str, end_t: float,
               hard: dict[int, int], soft: dict[int, int], tested: int) -> None:
    lot = {
        "format": "ampscreen-datalog/1", "lot_id": spec.lot_id, "station": spec.station,
        "operator": "test", "mode": "dry-run", "product": table.product,
        "sequence": {"file": "sequence.yaml", "source": "tests", "sha256": "0" * 64},
        "limits": {"file": "limits.yaml", "source": str(PX401_LIMITS),
                   "sha256": hashlib.sha256(limits_text.encode()).hexdigest()},
        "bench": {"file": "bench.yaml", "source": "tests", "sha256": "1" * 64},
        "software": {"name": "ampscreen-station", "version": "0.1.0"},
        "instruments": {"supply": "AMPSCREEN-SIM,ASP-2215,0001,1.0", "dmm1": "AMPSCREEN-SIM,ASM-65,0002,1.0"},
        "sites": spec.sites, "head": 1, "span_v": SPAN_V, "rf_ohm": 100000.0, "rs_ohm": 100.0,
        "start_time": _iso(spec.start_t), "end_time": _iso(end_t), "start_t": spec.start_t, "end_t": end_t,
        "complete": True, "parts_tested": tested,
        "hard_bins": {str(n): {"name": b.name, "pass": b.passing, "count": hard.get(n, 0)}
                      for n, b in table.hard_bins.items()},
        "soft_bins": {str(n): {"name": b.name, "pass": b.passing, "count": soft.get(n, 0)}
                      for n, b in table.soft_bins.items()},
        "tests": [],
    }
    (folder / "lot.json").write_text(json.dumps(lot, indent=2))


def finite(values: np.ndarray) -> np.ndarray:
    return values[np.isfinite(values)]





def _iso(t: float) -> str:
    return datetime.fromtimestamp(t, UTC).strftime("%Y-%m-%dT%H:%M:%SZ")


def hold_back_last_index(folder: Path) -> None:
    """Mark the last index of a 12-part, 4-site lot (parts 9-12) as still under test, as
    in_progress.json says it of a running lot (docs/datalog-format.md)."""
    (folder / "in_progress.json").write_text(json.dumps({"lot_id": "LOT-T1", "ids": ["P00009"],
                                                         "presented_before": 8, "parts_rows": 8,
                                                         "results_rows": 0, "t": 0.0}))

"""Re-grade and re-bin a datalog offline with another limit table ("what would this do to yield").

Per part, the logged computed rows are graded again with station.judge.grading.grade_part. When the
new table's common-mode regions differ from the datalog's own (their names, kinds, or
bounds at lot.json span_v), the region figures (cmrr, cmrr_slope, cm_step, vos_worst) are
recomputed from the logged raw vos_cm points with station.judge.measure.cmrr_figures; every other
figure is taken as logged.

Kept as logged, whatever the new table says: tester faults (their measurements are not
trusted, there is nothing to grade) and contact fails (an open or shorted part was never
measured; the contact rule is applied on the bench, with its retest).
"""

from __future__ import annotations

import csv
import hashlib
import json
import math
from dataclasses import dataclass, field
from pathlib import Path

import numpy as np
import pandas as pd

from station.config.limit_tables import LimitTable
from station.config.regions import Region
from station.judge import grading, measure
from station.review.limits import datalog_table
from station.review.load import RAW_PARAMS, Datalogs
from station.screen.pat_apply import pat_verdict

REGION_PARAMS = frozenset({"cmrr", "cmrr_slope", "cm_step", "vos_worst"})
BIN_TOLERANCE_V = 1e-9


class RebinError(Exception):
    """The datalog cannot be re-binned with this table; one line says why."""


@dataclass
class RebinResult:
    before: pd.DataFrame          # parts.csv as logged (plus DATALOG, PART_SEQ)
    after: pd.DataFrame           # the same rows, re-binned
    regions_recomputed: bool
    kept_contact: int
    kept_faults: int
    notes: list[str] = field(default_factory=list)
    figures: pd.DataFrame | None = None   # recomputed region figures: PART_SEQ, PARAM, REGION, RESULT

    def moved(self) -> int:
        return int(((self.before["HARD_BIN"] != self.after["HARD_BIN"]) |
                    (self.before["SOFT_BIN"] != self.after["SOFT_BIN"])).sum())


def regions_differ(old: LimitTable | None, new: LimitTable, span_v: float) -> bool:
    """True when the new table's regions (bounds at span_v, kinds) are not the old ones."""
    if old is None:
        return True
    if [(r.name, r.kind) for r in old.regions] != [(r.name, r.kind) for r in new.regions]:
        return True
    return any(abs(x - y) > BIN_TOLERANCE_V for a, b in zip(old.regions, new.regions, strict=True)
               for x, y in zip(a.vcm_range(span_v), b.vcm_range(span_v), strict=True))


def refuse_other_product(logs: Datalogs, new: LimitTable) -> None:
    """RebinError if the datalog is of another product than the table is written for."""
    logged = {str(lot.get("product")) for lot in logs.lots if lot.get("product")}
    if logged and logged != {new.product}:
        raise RebinError(f"{logs.folders[0]} is a datalog of {', '.join(sorted(logged))}, the limit table "
                         f"is for {new.product} (give a table for that product, or --any-product for a "
                         "table derived from this data, such as one from `station limits propose`)")


def rebin(logs: Datalogs, new: LimitTable) -> RebinResult:
    if len(logs.folders) != 1:
        raise RebinError("re-bin one datalog folder at a time")
    lot = logs.lots[0]
    old = datalog_table(logs, 0)
    span = lot.get("span_v")
    if not isinstance(span, int | float) or not span > 0:
        raise RebinError(f"{logs.folders[0]}/lot.json has no usable span_v; the regions cannot be placed")
    notes: list[str] = []
    if old is None:
        notes.append("the datalog's limits.yaml is missing or unreadable: region figures recomputed "
                     "from the raw points, contact fails told by their rows")
    recompute = regions_differ(old, new, float(span))
    results = logs.results
    sweeps = _sweeps(results) if recompute else {}
    if recompute and not sweeps:
        raise RebinError("the new table moves the common-mode regions, but the datalog has no raw "
                         "vos_cm points to recompute them from")
    computed = results[~results["PARAM"].isin(RAW_PARAMS)]
    per_part = _split(computed)
    before = logs.parts
    after = before.copy()
    contact = _contact_fails(before, per_part, old)
    kept_contact = kept_faults = 0
    recomputed: list[tuple[int, str, str, float]] = []
    hard, soft, grade, passed, fail_test = (after["HARD_BIN"].to_numpy().copy(), after["SOFT_BIN"].to_numpy().copy(),
                                            after["GRADE"].to_numpy().copy(), after["PASS"].to_numpy().copy(),
                                            after["FAIL_TEST"].to_numpy().copy())
    for i, seq in enumerate(before["PART_SEQ"].to_numpy()):
        if math.isnan(passed[i]):
            kept_faults += 1
            continue
        if contact[i]:
            kept_contact += 1
            continue
        part_results = per_part.get(int(seq), [])
        if recompute:
            part_results = _with_region_figures(part_results, sweeps.get(int(seq)), new.regions,
                                                float(span), str(before["PART_ID"].iat[i]))
            recomputed += [(int(seq), r.param, r.region or "", r.value)
                           for r in part_results if r.param in REGION_PARAMS]
        verdict = grading.grade_part(part_results, new)
        if new.pat is not None:           # a passing part outside a PAT limit (station/screen)
            verdict = pat_verdict(verdict, part_results, new.pat.limits, new)
        hard[i], soft[i] = verdict.hard_bin, verdict.soft_bin
        grade[i] = verdict.grade or ""
        passed[i] = np.nan if verdict.passed is None else float(verdict.passed)
        fail_test[i] = verdict.failing.result.test_num if verdict.failing is not None else np.nan
    after["HARD_BIN"], after["SOFT_BIN"], after["GRADE"] = hard, soft, grade
    after["PASS"], after["FAIL_TEST"] = passed, fail_test
    if recompute:
        notes.append("regions differ from the datalog's limits.yaml: cmrr, cmrr_slope, cm_step and "
                     "vos_worst recomputed from the raw vos_cm points")
    notes.append(f"kept as logged: {kept_contact} contact fails, {kept_faults} tester faults")
    figures = pd.DataFrame(recomputed, columns=["PART_SEQ", "PARAM", "REGION", "RESULT"]) if recompute else None
    return RebinResult(before, after, recompute, kept_contact, kept_faults, notes, figures)


def _split(rows: pd.DataFrame) -> dict[int, list[grading.Result]]:
    """Per PART_SEQ, its results in logged (execution) order."""
    seq = rows["PART_SEQ"].to_numpy()
    params = rows["PARAM"].astype(str).to_numpy()
    regions = rows["REGION"].astype(str).to_numpy()
    values = rows["RESULT"].to_numpy()
    tests = rows["TEST_NUM"].to_numpy()
    order = np.argsort(seq, kind="stable")
    out: dict[int, list[grading.Result]] = {}
    for start, stop in _runs(seq[order]):
        idx = order[start:stop]
        out[int(seq[idx[0]])] = [grading.Result(params[j], regions[j] or None, float(values[j]), int(tests[j]))
                                 for j in idx]
    return out


def _runs(sorted_keys: np.ndarray) -> list[tuple[int, int]]:
    if len(sorted_keys) == 0:
        return []
    cuts = np.flatnonzero(np.diff(sorted_keys)) + 1
    starts = np.concatenate([[0], cuts])
    stops = np.concatenate([cuts, [len(sorted_keys)]])
    return list(zip(starts.tolist(), stops.tolist(), strict=True))


@dataclass(frozen=True)
class Sweep:
    vcm: list[float]
    vos: list[float]
    test_base: int   # k*1000 of the sweep's test: its figures are numbered k*1000 + 1, 2, ...


def _sweeps(results: pd.DataFrame) -> dict[int, Sweep]:
    raw = results[results["PARAM"] == "vos_cm"]
    seq = raw["PART_SEQ"].to_numpy()
    vcm, vos, tests = raw["VCM"].to_numpy(), raw["RESULT"].to_numpy(), raw["TEST_NUM"].to_numpy()
    order = np.argsort(seq, kind="stable")
    sweeps = {}
    for start, stop in _runs(seq[order]):
        idx = order[start:stop]
        sweeps[int(seq[idx[0]])] = Sweep(vcm[idx].tolist(), vos[idx].tolist(), int(tests[idx[0]]) // 1000 * 1000)
    return sweeps


def _with_region_figures(results: list[grading.Result], sweep: Sweep | None,
                         regions: tuple[Region, ...], span_v: float,
                         part_id: str) -> list[grading.Result]:
    """The part's results with its region figures recomputed under the new regions.

    They take the place of the logged ones (execution order), numbered as the station numbers
    a sweep's figures. A part whose sweep was not reached (stopped on an earlier fail) keeps none.
    """
    kept = [r for r in results if r.param not in REGION_PARAMS]
    if sweep is None:
        return kept
    try:
        figures = measure.cmrr_figures(sweep.vcm, sweep.vos, regions, span_v)
    except measure.MeasurementError as exc:
        raise RebinError(f"part {part_id}: the logged sweep does not fit the new regions: {exc}") from None
    new = [grading.Result(f.param, f.region, f.value, sweep.test_base + i + 1) for i, f in enumerate(figures)]
    position = next((i for i, r in enumerate(results) if r.param in REGION_PARAMS), None)
    if position is None:  # no logged figures: they follow every result of an earlier test
        position = sum(1 for r in kept if r.test_num < sweep.test_base)
    else:
        position = sum(1 for r in results[:position] if r.param not in REGION_PARAMS)
    return kept[:position] + new + kept[position:]


def _contact_fails(parts: pd.DataFrame, per_part: dict[int, list[grading.Result]],
                   old: LimitTable | None) -> np.ndarray:
    """Which parts failed the contact check: by the old table's contact bins, else by their rows."""
    if old is not None:
        return ((parts["HARD_BIN"] == old.contact.hard_bin) &
                parts["SOFT_BIN"].isin([old.contact.open_soft_bin, old.contact.short_soft_bin])).to_numpy()
    only_contact = [all(r.param == "contact_iq" for r in per_part.get(int(s), [])) for s in parts["PART_SEQ"]]
    return (parts["PASS"] == 0).to_numpy() & np.array(only_contact, dtype=bool)


# ---- figures for the report -------------------------------------------------------------------

def grade_yield(parts: pd.DataFrame, grades: list[str]) -> dict[str, float]:
    """Share of decided parts (tester faults left out) per grade, and 'all' for any grade."""
    decided = parts[parts["PASS"].notna()]
    n = len(decided)
    out = {g: float(((decided["PASS"] == 1) & (decided["GRADE"] == g)).sum() / n) if n else math.nan
           for g in grades}
    out["all"] = float((decided["PASS"] == 1).sum() / n) if n else math.nan
    return out


def bin_comparison(result: RebinResult, column: str) -> pd.DataFrame:
    """bin, before, after, change: counts per bin number."""
    before = result.before[column].value_counts()
    after = result.after[column].value_counts()
    frame = pd.concat([before.rename("before"), after.rename("after")], axis=1).fillna(0).astype(int)
    frame.index.name = "bin"
    frame = frame.sort_index().reset_index()
    frame["change"] = frame["after"] - frame["before"]
    return frame


def move_matrix(result: RebinResult, column: str = "HARD_BIN") -> pd.DataFrame:
    """Counts of parts from each logged bin (rows) to each re-binned bin (columns)."""
    matrix = pd.crosstab(result.before[column].rename("from"), result.after[column].rename("to"))
    return matrix


def soft_moves(result: RebinResult) -> pd.DataFrame:
    """Soft-bin moves that happened: from, to, count (most first)."""
    moved = result.before["SOFT_BIN"] != result.after["SOFT_BIN"]
    frame = pd.DataFrame({"from": result.before.loc[moved, "SOFT_BIN"], "to": result.after.loc[moved, "SOFT_BIN"]})
    counts = frame.value_counts().rename("count").reset_index()
    return counts.sort_values(["count", "from", "to"], ascending=[False, True, True], kind="stable")


# ---- output -----------------------------------------------------------------------------------

def write_parts_csv(result: RebinResult, source_folder: Path, out_dir: Path, new: LimitTable) -> Path:
    """parts.csv with the new bins (same columns; other columns byte-for-byte as logged)."""
    out_dir.mkdir(parents=True, exist_ok=True)
    text = pd.read_csv(source_folder / "parts.csv", dtype=str, keep_default_na=False)
    after = result.after
    text["HARD_BIN"] = after["HARD_BIN"].astype(int).astype(str).to_numpy()
    text["SOFT_BIN"] = after["SOFT_BIN"].astype(int).astype(str).to_numpy()
    text["GRADE"] = after["GRADE"].fillna("").astype(str).to_numpy()
    text["PASS"] = [("" if math.isnan(v) else str(int(v))) for v in after["PASS"]]
    text["FAIL_TEST"] = [("" if math.isnan(v) else str(int(v))) for v in after["FAIL_TEST"]]
    target = out_dir / "parts.csv"
    text.to_csv(target, index=False, quoting=csv.QUOTE_MINIMAL)
    source_text = Path(new.source).read_bytes() if Path(new.source).is_file() else b""
    provenance = {"rebinned_from": str(source_folder.resolve()), "limits": new.source,
                  "limits_sha256": hashlib.sha256(source_text).hexdigest() if source_text else None,
                  "regions_recomputed": result.regions_recomputed, "moved": result.moved()}
    (out_dir / "rebin.json").write_text(json.dumps(provenance, indent=2) + "\n", encoding="utf-8")
    return target

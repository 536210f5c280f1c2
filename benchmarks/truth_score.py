"""Scoring a dry-run datalog against the simulator's truth (sim_truth.csv).

The true figures of a part are the station's own measurement math (station/measure) applied
to the part's exact, noise-free offsets at the sequence's conditions (sim_instruments/model
vos_true), so they share every definition with the measured ones (least-squares region
slopes, end-point full range, crossover spread); what differs is noise and settling only.
A misbin: the part's hard bin differs from the bin station/grading gives its true figures
with the same limits. An escape: a part binned good whose true figures fail a limit of the
grade it was binned under (or which truly has no contact).
"""

from __future__ import annotations

import math
from dataclasses import dataclass, field
from pathlib import Path
from typing import Any

import numpy as np
import pandas as pd

from sim_instruments.model import vos_true
from sim_instruments.population import PartTruth
from station.config.limit_tables import Grade, Limit, LimitTable
from station.config.sequence import Sequence
from station.judge.budget import PartFigures
from station.judge.grading import Result, check_value, contact_verdict, grade_part, limit_for
from station.kinds.base import KindContext, SweepKind
from station.kinds.budget import applications_of, budget_values
from station.kinds.registry import kind_of

NOMINAL_SPAN_V = 10.0


def truth_parts(path: Path) -> dict[str, PartTruth]:
    """PartTruth records rebuilt from sim_truth.csv."""
    table = pd.read_csv(path)
    parts = {}
    for index, row in table.iterrows():
        parts[row["PART_ID"]] = PartTruth(
            part_id=row["PART_ID"], index=int(index), defect=row["DEFECT"],
            reseat_fixes=bool(row["RESEAT_FIXES"]), vos_low_v=row["VOS_LOW_V"], cm_step_v=row["CM_STEP_V"],
            cmrr_low_vv=row["CMRR_LOW_VV"], cmrr_high_vv=row["CMRR_HIGH_VV"],
            crossover_below_vplus_v=NOMINAL_SPAN_V / 2.0 - row["CROSSOVER_VCM_V"],
            crossover_width_v=row["CROSSOVER_WIDTH_V"], aol_vv=row["AOL_VV"], psrr_vv=row["PSRR_VV"],
            iq_a=row["IQ_A"], noise_v_rthz=row["NOISE_V_RTHZ"], flicker_v=row["FLICKER_V"],
            tau_fast_s=row["TAU_FAST_S"], tau_slow_s=row["TAU_SLOW_S"],
            thermal_v_per_v=row["THERMAL_V_PER_V"],
            short_ohm=150.0 if row["DEFECT"] == "short" else math.inf,
            # truth files written before the bias currents existed have no such columns
            ib_plus_a=float(row.get("IB_PLUS_A", 0.0)), ib_minus_a=float(row.get("IB_MINUS_A", 0.0)),
            leaky=bool(row.get("LEAKY", 0)))
    return parts


def true_contact(part: PartTruth) -> str:
    if part.defect == "short":
        return "short"
    if part.defect == "open" and not part.reseat_fixes:
        return "open"
    return "ok"


def true_results(part: PartTruth, sequence: Sequence, table: LimitTable) -> list[Result]:
    """The part's exact figures, in the station's execution order (contact Iq left out): each
    sweep kind's own figure math over the part's exact offsets at that kind's conditions."""
    span = sequence.span_v
    context = KindContext(span, table.regions)
    results: list[Result] = []
    for step in sequence.tests:
        kind = kind_of(step)
        if isinstance(kind, SweepKind):
            # A condition's rails put the inputs at VCM -(V+ + V-)/2 on a span V+ - V-.
            readings = [vos_true(part, -(v_pos + v_neg) / 2.0, v_pos - v_neg, force)
                        for (v_pos, v_neg), force in kind.conditions(step, span)]
            figures = kind.figures(step, readings, context)
            results.extend(Result(f.param, f.region, f.value, 0) for f in figures)
        elif step.kind == "supply_current":
            results.append(Result("iq", None, part.iq(span), 0))
        elif step.kind == "budget":
            results.extend(_true_budget(part, sequence, context, results))
        elif step.kind == "bias_current":
            ios = part.ib_plus_a - part.ib_minus_a
            results.extend(Result(param, None, value, 0) for param, value in (
                ("ib_plus", part.ib_plus_a), ("ib_minus", part.ib_minus_a),
                ("ib", (part.ib_plus_a + part.ib_minus_a) / 2.0), ("ios", ios), ("ios_both", ios)))
    return results


def _true_budget(part: PartTruth, sequence: Sequence, context: KindContext,
                 so_far: list[Result]) -> list[Result]:
    """The budget rows from the part's exact offsets at the sweep's points and its true figures."""
    span = sequence.span_v
    apps = applications_of(sequence, Path(sequence.source))
    vcms = sequence.steps("cm_sweep")[0].point_vcms(span)
    by_param = {r.param: r.value for r in so_far if r.region is None}
    figures = PartFigures(vos=vos_true(part, 0.0, span), aol_slope=by_param.get("aol_slope", math.nan),
                          cm_points=tuple((v, vos_true(part, v, span)) for v in vcms),
                          ib_plus=part.ib_plus_a, ib_minus=part.ib_minus_a)
    context = KindContext(span, context.regions, apps)
    return [Result(param, app.name, value, 0) for app in apps
            for param, value in budget_values(app, figures, context).items()]


def true_bin(part: PartTruth, sequence: Sequence, table: LimitTable) -> int:
    contact = true_contact(part)
    if contact != "ok":
        return contact_verdict(contact, table).hard_bin
    return grade_part(true_results(part, sequence, table), table).hard_bin


@dataclass
class Score:
    parts: int                      # parts judged (tester faults left out)
    misbins: int
    escapes: int
    errors: dict[str, float]        # RMS error vs truth: vos (V), cmrr slopes (V/V), dB figures
    # Each misbinned or escaped part, named: "D00529 site 2: binned 1 grade A, true bin 2;
    # ios true 2.012e-12 measured 1.98e-12 (limit -2e-12..2e-12)" (the figures the true
    # value fails in the grade it was binned under), so a nonzero count can be looked into.
    wrong: list[str] = field(default_factory=list)

    @property
    def misbin_rate(self) -> float:
        return self.misbins / self.parts if self.parts else math.nan


def score_datalog(folder: Path, sequence: Sequence, table: LimitTable, only: set[str] | None = None) -> Score:
    """Misbins, escapes and RMS errors of the lot in `folder` (optionally of the parts `only`)."""
    truth = truth_parts(folder / "sim_truth.csv")
    parts = pd.read_csv(folder / "parts.csv", dtype={"GRADE": str})
    results = pd.read_csv(folder / "results.csv", dtype={"REGION": str})
    if only is not None:
        parts = parts[parts["PART_ID"].isin(only)]
        results = results[results["PART_ID"].isin(only)]
    judged = parts[parts["PASS"].notna()]
    misbins = escapes = 0
    expected: dict[str, dict[tuple[str, str], float]] = {}
    wrong: list[str] = []
    for row in judged.itertuples():
        part = truth[row.PART_ID]
        expected_bin = true_bin(part, sequence, table)
        misbinned = expected_bin != row.HARD_BIN
        escaped = row.PASS == 1 and _escaped(part, str(row.GRADE), sequence, table)
        misbins += misbinned
        escapes += escaped
        if misbinned or escaped:
            wrong.append(_describe(row, part, expected_bin, escaped, results, sequence, table))
        if part.defect == "none":
            expected[row.PART_ID] = {(r.param, r.region or ""): r.value
                                     for r in true_results(part, sequence, table)}
    return Score(len(judged), misbins, escapes, _errors(results, expected), wrong)


def _describe(row: Any, part: PartTruth, expected_bin: int, escaped: bool, results: pd.DataFrame,
              sequence: Sequence, table: LimitTable) -> str:
    """One line on a misbinned or escaped part: its bins, and each true figure that fails a
    limit of the grade it was binned under, beside what the station measured."""
    text = (f"{row.PART_ID} site {row.SITE_NUM}: binned {row.HARD_BIN} grade {row.GRADE}, "
            f"true bin {expected_bin}{' (escape)' if escaped else ''}")
    grade = table.grade(str(row.GRADE)) if row.PASS == 1 else None
    if grade is None:
        return text
    mine = results[results["PART_ID"] == row.PART_ID]
    for result, limit in _failing(part, grade, sequence, table):
        measured = mine.loc[(mine["PARAM"] == result.param)
                            & (mine["REGION"].fillna("") == (result.region or "")), "RESULT"]
        shown = f"{float(measured.iloc[-1]):.4g}" if len(measured) else "not logged"
        text += (f"; {result.param} {result.region or ''} true {result.value:.4g} measured {shown} "
                 f"(limit {_edge(limit.low)}..{_edge(limit.high)})")
    return text


def _edge(value: float | None) -> str:
    return "none" if value is None else f"{value:.4g}"


def _escaped(part: PartTruth, grade_name: str, sequence: Sequence, table: LimitTable) -> bool:
    return true_contact(part) != "ok" or bool(_failing(part, table.grade(grade_name), sequence, table))


def _failing(part: PartTruth, grade: Grade, sequence: Sequence, table: LimitTable) -> list[tuple[Result, Limit]]:
    """Each true figure of `part` that fails a limit of `grade`, with that limit."""
    failing = []
    for result in true_results(part, sequence, table):
        limit = limit_for(grade, result.param, result.region)
        if limit is not None and not check_value(result.value, limit):
            failing.append((result, limit))
    return failing


ERROR_FIGURES = {"vos": ("vos", ""), "cmrr_slope_low": ("cmrr_slope", "low"),
                 "cmrr_slope_high": ("cmrr_slope", "high"), "cmrr_db_low": ("cmrr", "low"),
                 "cmrr_db_high": ("cmrr", "high"), "aol_db": ("aol", ""), "psrr_slope": ("psrr_slope", ""),
                 "ib_plus": ("ib_plus", ""), "ib_minus": ("ib_minus", ""), "ios": ("ios", "")}


def _errors(results: pd.DataFrame, expected: dict[str, dict[tuple[str, str], float]]) -> dict[str, float]:
    measured = results[results["PART_ID"].isin(expected.keys())]
    measured = measured.assign(REGION=measured["REGION"].fillna(""))
    lookup = measured.set_index(["PART_ID", "PARAM", "REGION"])["RESULT"]
    lookup = lookup[~lookup.index.duplicated()]
    errors = {}
    for name, key in ERROR_FIGURES.items():
        diffs = []
        for part_id, truth in expected.items():
            where = (part_id, *key)
            if key in truth and where in lookup.index:
                diff = float(lookup[where]) - truth[key]
                if math.isfinite(diff):
                    diffs.append(diff)
        errors[name] = float(np.sqrt(np.mean(np.square(diffs)))) if diffs else math.nan
    return errors

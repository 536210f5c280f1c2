"""A repeatability study's figures: per parameter and region, the ANOVA components, and per
limit of each grade the GRR as a share of the tolerance, ndc and a verdict.

Rejection figures (CMRR, PSRR) and AOL are studied on the slope they come from, in V/V
(`cmrr_slope`, `psrr_slope`, `aol_slope`), not on dB: a limit "CMRR >= L dB" is the window
|slope| <= 10^(-L/20) on the signed slope, a tolerance of 2 x 10^(-L/20). dB is a log of a
value that crosses zero, so its spread says nothing about the gauge (a slope near 0 reads
150 dB). Decision rules: %GRR under 10 % acceptable, 10-30 % conditional, over 30 % not;
two-sided %GRR = 6 GRR / (USL - LSL), one-sided 3 GRR / |limit - mean| (gauge-study practice,
AIAG MSA manual, from memory).
"""

from __future__ import annotations

import math
from collections.abc import Sequence
from dataclasses import dataclass, field
from pathlib import Path

import pandas as pd

from station.config.limit_tables import Limit, LimitTable
from station.config.parameters import LIMITABLE, PARAMETERS
from station.datalog.folder import DatalogError
from station.qualify.anova import Anova, Balanced, StudyDataError, balance, crossed_anova
from station.review.load import Datalogs, computed_rows, load_datalogs
from station.review.units import fmt

# A dB figure is studied on the slope row it is computed from.
SLOPE_OF: dict[str, str] = {"cmrr": "cmrr_slope", "psrr": "psrr_slope", "aol": "aol_slope"}
ACCEPTABLE_PCT = 10.0
CONDITIONAL_PCT = 30.0


def db_to_slope(db: float) -> float:
    """|slope| at a rejection of `db`: 10^(-dB/20) (120 dB -> 1e-6 V/V)."""
    return 10.0 ** (-db / 20.0)


def verdict(pct: float) -> str:
    if not math.isfinite(pct):
        return "no tolerance"
    if pct < ACCEPTABLE_PCT:
        return "acceptable"
    if pct <= CONDITIONAL_PCT:
        return "conditional"
    return "not acceptable"


@dataclass(frozen=True)
class Tolerance:
    """What the GRR is compared with for one limit."""

    kind: str          # "two-sided", "one-sided", "slope window"
    width: float       # USL - LSL; or |limit - mean| for one-sided (then 3 GRR, not 6)
    text: str

    def pct_grr(self, grr: float) -> float:
        if self.width <= 0:
            return math.inf
        spread = 3.0 * grr if self.kind == "one-sided" else 6.0 * grr
        return 100.0 * spread / self.width


def tolerance_of(limit: Limit, mean: float) -> Tolerance | None:
    """The tolerance a limit gives, in the units of the studied value (None: no usable limit).
    The specification limits: of a guard-banded table, spec_low/spec_high."""
    low, high = limit.spec
    if limit.units == "dB":
        if low is None:
            return None
        edge = db_to_slope(low)
        return Tolerance("slope window", 2.0 * edge, f">= {low:g} dB: |slope| <= {edge:.3g} V/V")
    if low is not None and high is not None:
        return Tolerance("two-sided", high - low, f"{fmt(low, limit.units)} to {fmt(high, limit.units, with_unit=True)}")
    bound = low if low is not None else high
    assert bound is not None  # a limit has low, high or both (limit_tables checks it)
    side = ">=" if low is not None else "<="
    return Tolerance("one-sided", abs(bound - mean),
                     f"{side} {fmt(bound, limit.units, with_unit=True)} (mean to limit)")


@dataclass(frozen=True)
class LimitVerdict:
    grade: str
    tolerance: Tolerance
    pct_grr: float
    verdict: str


@dataclass
class FigureStudy:
    param: str          # the limited parameter (cmrr, vos, ...)
    region: str         # "" where none
    studied: str        # the logged parameter the values are (cmrr_slope for cmrr)
    units: str          # units of the studied values
    data: pd.DataFrame  # part, appraiser, value (after balancing)
    balanced: Balanced
    anova: Anova
    limits: list[LimitVerdict] = field(default_factory=list)

    @property
    def name(self) -> str:
        return f"{self.param} {self.region}".strip()


@dataclass
class StudyReport:
    folders: list[Path]
    stations: list[str]
    appraiser_kind: str          # "site" or "station/site"
    figures: list[FigureStudy]
    skipped: dict[str, str]      # figure -> why it has no components
    table_source: str | None


def load_study(folders: Sequence[Path]) -> Datalogs:
    logs = load_datalogs(folders)
    for folder, lot in zip(logs.folders, logs.lots, strict=True):
        if not isinstance(lot.get("study"), dict):
            raise DatalogError(f"{folder}: not a study (lot.json has no 'study'): "
                               "give folders written by `station study run`")
    return logs


def study_report(logs: Datalogs, table: LimitTable | None) -> StudyReport:
    stations = [str(lot.get("station", "")) for lot in logs.lots]
    several = len(set(stations)) > 1
    rows = computed_rows(logs.results)
    station_of = pd.Series(stations).iloc[rows["DATALOG"].to_numpy()].to_numpy()
    appraiser = (pd.Series(station_of).astype(str) + "/site " + rows["SITE_NUM"].astype(str).to_numpy()
                 if several else "site " + rows["SITE_NUM"].astype(str))
    frame = pd.DataFrame({
        "param": rows["PARAM"].astype(str).to_numpy(), "region": rows["REGION"].astype(str).to_numpy(),
        "part": rows["PART_ID"].astype(str).to_numpy(), "appraiser": pd.Series(appraiser).to_numpy(),
        "value": rows["RESULT"].to_numpy(dtype=float), "units": rows["UNITS"].astype(str).to_numpy()})
    figures: list[FigureStudy] = []
    skipped: dict[str, str] = {}
    limited = sorted({(p, r) for p, r in zip(frame["param"], frame["region"], strict=True) if p in LIMITABLE},
                     key=_figure_order)
    for param, region in limited:
        studied = SLOPE_OF.get(param, param)
        data = frame[(frame["param"] == studied) & (frame["region"] == region)]
        name = f"{param} {region}".strip()
        if data.empty:
            skipped[name] = f"no {studied} rows"
            continue
        try:
            balanced = balance(data[["part", "appraiser", "value"]])
            anova = crossed_anova(balanced.frame)
        except StudyDataError as exc:
            skipped[name] = str(exc)
            continue
        units = PARAMETERS[studied].units
        figure = FigureStudy(param, region, studied, units, balanced.frame, balanced, anova)
        if table is not None:
            figure.limits = _limit_verdicts(table, param, region or None, anova)
        figures.append(figure)
    return StudyReport(list(logs.folders), sorted(set(stations)), "station/site" if several else "site",
                       figures, skipped, table.source if table is not None else None)


def _limit_verdicts(table: LimitTable, param: str, region: str | None, anova: Anova) -> list[LimitVerdict]:
    out = []
    for grade in table.grades:
        for limit in grade.limits:
            if limit.param != param or limit.region != region:
                continue
            tolerance = tolerance_of(limit, anova.grand_mean)
            if tolerance is None:
                continue
            pct = tolerance.pct_grr(anova.components.grr)
            out.append(LimitVerdict(grade.name, tolerance, pct, verdict(pct)))
    return out


_ORDER = ["iq", "vos", "cmrr", "cm_step", "vos_worst", "aol", "psrr"]
_REGION_ORDER = ["low", "transition", "high", "full", ""]


def _figure_order(key: tuple[str, str]) -> tuple[int, int, str]:
    param, region = key
    p = _ORDER.index(param) if param in _ORDER else len(_ORDER)
    r = _REGION_ORDER.index(region) if region in _REGION_ORDER else len(_REGION_ORDER)
    return p, r, region

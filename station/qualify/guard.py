"""Guard bands: acceptance limits moved inside the specification limits by w = k u.

Decision rules (JCGM 106:2012 and ISO 14253-1, from memory): with standard uncertainty u and
expanded uncertainty U = k u, *guarded acceptance* accepts inside the spec limits moved in by
w = U; *simple acceptance* accepts up to the spec limits (w = 0). For a normal measurement
model the probability that a part measured at y conforms to an upper limit TU is
Phi((TU - y) / u) (lower limit TL: Phi((y - TL) / u)); at a guarded acceptance limit with
k = 2 the worst-case risk of accepting a part that does not conform is 1 - Phi(2) = 2.28 %.

u here is the study's GRR of the figure (repeatability and reproducibility together, the
site offsets included), one value for every site: the limit table has no per-site limits.
Rejection figures and AOL are guarded on their slope: spec "L dB" is |slope| <= s =
10^(-L/20); the acceptance window |slope| <= s - w is written back in dB.
"""

from __future__ import annotations

import math
from dataclasses import dataclass

from scipy.stats import norm

from station.config.limit_edit import EditableTable, yaml_scalar
from station.config.limit_tables import Limit, LimitTable
from station.errors import Refused
from station.qualify.study import StudyReport, db_to_slope
from station.review.units import display_unit

RULES = ("guarded", "simple")


def guard_width(u: float, k: float, rule: str) -> float:
    if rule not in RULES:
        raise ValueError(f"rule {rule!r}: one of {', '.join(RULES)}")
    return k * u if rule == "guarded" else 0.0


def acceptance_limits(spec_low: float | None, spec_high: float | None, w: float) -> tuple[float | None, float | None]:
    """Acceptance limits of a V or A figure: each spec limit moved inward by w."""
    return (None if spec_low is None else spec_low + w, None if spec_high is None else spec_high - w)


def acceptance_db(spec_db: float, w_slope: float) -> float | None:
    """Acceptance limit in dB of a rejection figure whose slope window |s| <= 10^(-dB/20) is
    narrowed by w (V/V); None if the guard takes the whole window."""
    edge = db_to_slope(spec_db) - w_slope
    return None if edge <= 0 else -20.0 * math.log10(edge)


def conformance_probability(y: float, u: float, low: float | None = None, high: float | None = None) -> float:
    """Probability that a part measured at y lies within [low, high] (normal model, standard
    uncertainty u): Phi((high - y) / u) - Phi((low - y) / u)."""
    upper = 1.0 if high is None else float(norm.cdf((high - y) / u))
    lower = 0.0 if low is None else float(norm.cdf((low - y) / u))
    return upper - lower


@dataclass(frozen=True)
class GuardLine:
    grade: str
    figure: str
    spec: str
    u: float
    w: float
    acceptance: str
    share: float          # of the tolerance the guard takes
    units: str            # of u and w
    note: str = ""


def _tighter(value: float, units: str, upward: bool) -> str:
    """A limit written in readable units, rounded towards the inside (never looser)."""
    factor, label = display_unit(units)
    steps = value * factor * 1e4
    rounded = (math.ceil(steps - 1e-6) if upward else math.floor(steps + 1e-6)) / 1e4
    return f"{rounded:g} {label}"


def guard_table(editable: EditableTable, table: LimitTable, report: StudyReport, rule: str, k: float,
                max_share: float, study_name: str) -> list[GuardLine]:
    """Write acceptance limits, spec limits and the guard into `editable` for every limit whose
    figure the study has; returns what was done, one line per limit."""
    grr = {(f.param, f.region or None): f.anova.components.grr for f in report.figures}
    means = {(f.param, f.region or None): f.anova.grand_mean for f in report.figures}
    lines: list[GuardLine] = []
    for grade in table.grades:
        for limit in grade.limits:
            figure = f"{limit.param} {limit.region or ''}".strip()
            key = (limit.param, limit.region)
            if key not in grr:
                lines.append(GuardLine(grade.name, figure, "", math.nan, math.nan, "unchanged", math.nan, "",
                                       "not in the study: left as it is"))
                continue
            _, entry = editable.limit_entry(grade.name, limit.param, limit.region)
            lines.append(_guard_one(editable, entry, grade.name, figure, limit, grr[key], means[key], rule, k,
                                    max_share, study_name))
    return lines


def _guard_one(editable: EditableTable, entry, grade: str, figure: str, limit: Limit, u: float, mean: float,
               rule: str, k: float, max_share: float, study_name: str) -> GuardLine:
    w = guard_width(u, k, rule)
    spec_low, spec_high = limit.spec
    if limit.units == "dB":
        if spec_low is None:
            return GuardLine(grade, figure, "", u, w, "unchanged", math.nan, "V/V", "no low dB limit")
        acc = acceptance_db(spec_low, w)
        if acc is None:
            raise Refused(f"{editable.path}: grade {grade} {figure}: the guard band k u = {w:.3g} V/V takes the "
                          f"whole window |slope| <= {db_to_slope(spec_low):.3g} V/V of {spec_low:g} dB "
                          "(improve the station, or use --rule simple)")
        share = w / db_to_slope(spec_low)
        new = {"low": f"{math.ceil(acc * 1000 - 1e-6) / 1000:g} dB"}
        spec_text = f">= {spec_low:g} dB"
        units = "V/V"
    else:
        low, high = acceptance_limits(spec_low, spec_high, w)
        if low is not None and high is not None and low >= high:
            raise Refused(f"{editable.path}: grade {grade} {figure}: the guard bands (2 x {w:.3g} {limit.units}) "
                          "close the acceptance window (improve the station, or use --rule simple)")
        if spec_low is not None and spec_high is not None:
            share = 2 * w / (spec_high - spec_low)
        else:
            bound = spec_low if spec_low is not None else spec_high
            assert bound is not None
            share = w / abs(bound - mean) if bound != mean else math.inf
        new = {}
        if low is not None:
            new["low"] = _tighter(low, limit.units, upward=True)
        if high is not None:
            new["high"] = _tighter(high, limit.units, upward=False)
        spec_text = " to ".join(_tighter(v, limit.units, True) for v in (spec_low, spec_high) if v is not None)
        units = limit.units
    for side, text in new.items():
        spec_key = f"spec_{side}"
        if spec_key not in entry:
            editable.set_value(entry, spec_key, yaml_scalar(str(entry[side])), before=side)
        editable.set_value(entry, side, text)
    guard = f'{{rule: {rule}, k: {k:g}, u: "{u:.4g}", study: {_quote(study_name)}}}'
    editable.set_value(entry, "guard", guard)
    note = f"guard takes {100 * share:.1f} % of the tolerance (over {100 * max_share:g} %)" if share > max_share else ""
    return GuardLine(grade, figure, spec_text, u, w, ", ".join(f"{k_}: {v}" for k_, v in new.items()), share,
                     units, note)


def _quote(text: str) -> str:
    return '"' + text.replace("\\", "\\\\").replace('"', '\\"') + '"'

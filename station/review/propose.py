"""Propose a limit table from characterisation data (a datalog), with the yield it would give.

Per limitable parameter and region, from the finite logged values (trade practice, common
practice, no source):
- typical = mean + 1 sigma (of |value| for a signed error, of the slope for a rejection);
- the limit sits k sigma from the mean:
  - cmrr, psrr: their V/V slopes are the Gaussian ones (about zero), so the minimum in dB is
    -20 log10(|mean| + k sigma) of the logged slope (cmrr_slope of the same region, psrr_slope);
  - aol: a minimum, mean - k sigma in dB (AOL spreads log-normally, so dB is the Gaussian scale);
  - vos: a symmetric window +-(|mean| + k sigma);
  - cm_step, vos_worst: a maximum, mean + k sigma;
  - iq: a window mean +- k sigma.
The table has one grade "P" and keeps the datalog's regions, bins and contact rule. Limits are
rounded to 4 significant digits in readable units; the predicted yield is computed with the
rounded limits as written.
"""

from __future__ import annotations

import math
from dataclasses import dataclass

import numpy as np
import pandas as pd
import yaml

from station.config.files import ConfigError
from station.config.limit_tables import LimitTable, parse_limit_table
from station.config.parameters import LIMITABLE, PARAMETERS
from station.config.quantities import rejection_db
from station.review.limits import datalog_table
from station.review.load import Datalogs, computed_rows
from station.review.units import display_unit

GRADE = "P"
_SLOPE_OF = {"cmrr": "cmrr_slope", "psrr": "psrr_slope"}
_NAMES = {"iq": "Iq out of window", "vos": "Offset", "cmrr": "CMRR", "cm_step": "Crossover step",
          "vos_worst": "Offset in transition", "aol": "Open-loop gain", "psrr": "PSRR"}


class ProposeError(Exception):
    """No table can be proposed from this datalog; one line says why."""


@dataclass(frozen=True)
class Proposal:
    param: str
    region: str
    units: str
    count: int
    mean: float        # of the distribution the limit is set on (slope for cmrr/psrr)
    sigma: float
    typical: float     # in the parameter's units
    low: float | None
    high: float | None
    method: str


def _sig(value: float, units: str) -> float:
    """Round to 4 significant digits in the readable unit (e.g. 52.13 uV), back in SI."""
    factor, _ = display_unit(units)
    shown = float(f"{value * factor:.4g}")
    return float(f"{shown / factor:.15g}")


def _stats(values: np.ndarray) -> tuple[float, float]:
    return float(np.mean(values)), float(np.std(values, ddof=1))


def propose_limits(logs: Datalogs, sigma_k: float) -> list[Proposal]:
    rows = computed_rows(logs.results)
    values = {key: frame["RESULT"].to_numpy() for key, frame in
              rows.groupby([rows["PARAM"].astype(str), rows["REGION"].astype(str)], sort=False)}
    proposals = []
    for (param, region), raw in values.items():
        if param not in LIMITABLE:
            continue
        finite = raw[np.isfinite(raw)]
        units = PARAMETERS[param].units
        if param in _SLOPE_OF and (_SLOPE_OF[param], region) in values:
            slopes = values[(_SLOPE_OF[param], region)]
            slopes = slopes[np.isfinite(slopes)]
            if len(slopes) < 2:
                continue
            mean, sd = _stats(slopes)
            floor = _sig(rejection_db(abs(mean) + sigma_k * sd), units)
            proposals.append(Proposal(param, region, units, len(slopes), mean, sd,
                                      rejection_db(abs(mean) + sd), floor, None,
                                      f"-20 log10(|mean| + {sigma_k:g} sigma) of {_SLOPE_OF[param]}"))
            continue
        if len(finite) < 2:
            continue
        mean, sd = _stats(finite)
        low: float | None
        high: float | None
        if param in ("cmrr", "psrr", "aol"):
            low, high, typical, how = mean - sigma_k * sd, None, mean, f"mean - {sigma_k:g} sigma (dB)"
        elif param == "vos":
            half = abs(mean) + sigma_k * sd
            low, high, typical, how = -half, half, abs(mean) + sd, f"+-(|mean| + {sigma_k:g} sigma)"
        elif param in ("cm_step", "vos_worst"):
            low, high, typical, how = None, mean + sigma_k * sd, mean + sd, f"mean + {sigma_k:g} sigma"
        else:
            low, high, typical, how = mean - sigma_k * sd, mean + sigma_k * sd, mean, f"mean +- {sigma_k:g} sigma"
        proposals.append(Proposal(param, region, units, len(finite), mean, sd, typical,
                                  None if low is None else _sig(low, units),
                                  None if high is None else _sig(high, units), how))
    if not proposals:
        raise ProposeError("the datalog has no finite results of a limitable parameter to propose limits from")
    return proposals


def _quantity(value: float, units: str) -> str:
    factor, label = display_unit(units)
    return f"{value * factor:.4g} {label}"


def table_yaml(product: str, proposals: list[Proposal], template: LimitTable, sigma_k: float,
               source: str) -> str:
    """The proposed table as YAML text in the limit-table format (limits/px401.yaml)."""
    first = template.grades[0]
    bins_of = {(lim.param, lim.region or ""): (lim.soft_bin, lim.bin_name)
               for g in reversed(template.grades) for lim in g.limits}
    used = set(template.soft_bins)
    next_bin = max(used | {99}) + 1
    limits = []
    for p in proposals:
        soft = bins_of.get((p.param, p.region))
        if soft is None:
            soft = (next_bin, f"{_NAMES.get(p.param, p.param)}{' ' + p.region if p.region else ''}")
            next_bin += 1
        entry: dict[str, object] = {"param": p.param}
        if p.region:
            entry["region"] = p.region
        if p.low is not None:
            entry["low"] = _quantity(p.low, p.units)
        if p.high is not None:
            entry["high"] = _quantity(p.high, p.units)
        entry.update({"soft_bin": soft[0], "bin": soft[1]})
        limits.append(entry)
    c = template.contact
    data = {
        "product": product,
        "note": f"Proposed from {source} at {sigma_k:g} sigma; review before use.",
        "regions": {r.name: {"from": str(r.lower), "to": str(r.upper), "kind": r.kind} for r in template.regions},
        # One grade: its pass hard bin takes the grade's name; the other pass bins go unused.
        "hard_bins": {n: {"name": f"Grade {GRADE}" if n == first.hard_bin else b.name, "pass": b.passing}
                      for n, b in template.hard_bins.items() if n == first.hard_bin or not b.passing},
        "fail_hard_bin": template.fail_hard_bin,
        "contact": {"open_below": _quantity(c.open_below_a, "A"), "short_above": _quantity(c.short_above_a, "A"),
                    "open_soft_bin": c.open_soft_bin, "short_soft_bin": c.short_soft_bin, "hard_bin": c.hard_bin},
        "tester_fault": {"hard_bin": template.tester_fault_hard_bin, "soft_bin": template.tester_fault_soft_bin},
        "grades": [{"name": GRADE, "hard_bin": first.hard_bin, "soft_bin": first.soft_bin,
                    "bin": f"Grade {GRADE}", "limits": limits}],
    }
    header = (f"# Limit table proposed by `station limits propose` from {source}\n"
              f"# at {sigma_k:g} sigma from the mean (typical = mean + 1 sigma). Review before use.\n")
    return header + yaml.safe_dump(data, sort_keys=False, default_flow_style=None, width=110)


def predicted_yield(logs: Datalogs, table: LimitTable) -> tuple[pd.DataFrame, float]:
    """Share of parts that pass each limit of the table's first grade, and all of them.

    Over the parts with a pass/fail indication in the datalog (tester faults left out); a
    contact fail, or a part without the figure, fails that limit. Vectorised over the logged
    rows, independent of the grading code.
    """
    parts = logs.parts[logs.parts["PASS"].notna()]
    seqs = parts["PART_SEQ"].to_numpy()
    rows = computed_rows(logs.results)
    keys = rows["PARAM"].astype(str) + "|" + rows["REGION"].astype(str)
    wide = pd.DataFrame({"seq": rows["PART_SEQ"].to_numpy(), "key": keys.to_numpy(),
                         "value": rows["RESULT"].to_numpy()}).drop_duplicates(["seq", "key"], keep="last")
    wide = wide.pivot(index="seq", columns="key", values="value").reindex(seqs)
    every = np.ones(len(seqs), dtype=bool)
    out = []
    for lim in table.grades[0].limits:
        column = f"{lim.param}|{lim.region or ''}"
        value = wide[column].to_numpy() if column in wide else np.full(len(seqs), np.nan)
        ok = ~np.isnan(value)
        if lim.low is not None:
            ok &= value >= lim.low
        if lim.high is not None:
            ok &= value <= lim.high
        every &= ok
        out.append({"param": lim.param, "region": lim.region or "", "low": lim.low, "high": lim.high,
                    "units": lim.units, "yield": float(ok.mean()) if len(ok) else math.nan})
    return pd.DataFrame(out), float(every.mean()) if len(every) else math.nan


def propose(logs: Datalogs, product: str, sigma_k: float) -> tuple[str, LimitTable, list[Proposal], pd.DataFrame, float]:
    """(YAML text, the table it parses to, proposals, per-limit yield, overall yield)."""
    if len(logs.folders) != 1:
        raise ProposeError("propose from one datalog folder at a time")
    if not sigma_k > 0:
        raise ProposeError(f"--sigma must be above zero, got {sigma_k:g}")
    template = datalog_table(logs, 0)
    if template is None:
        raise ProposeError(f"{logs.folders[0]}: limits.yaml missing or unreadable; it gives the regions and bins")
    proposals = propose_limits(logs, sigma_k)
    text = table_yaml(product, proposals, template, sigma_k, str(logs.folders[0]))
    try:
        table = parse_limit_table(text, "<proposed table>")
    except ConfigError as exc:  # a bug here, not the user's: say so plainly
        raise ProposeError(f"the proposed table does not load: {exc}") from None
    per_limit, overall = predicted_yield(logs, table)
    return text, table, proposals, per_limit, overall

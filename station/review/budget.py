"""Application error budgets of a lot already tested: the same math as the budget test of a
sequence (station/kinds/budget.py, station/judge/budget.py) applied offline to each part's
logged rows, for applications the lot was never screened for.

The tested span and the common-mode regions come from the datalog's own copies of the
sequence and limit table, so the budget refers the application's range exactly as the lot
was swept. `budget_distribution` gives the spread per application, read the same way by
`station budget` and by `station summary` (for the budget rows a lot logged).
"""

from __future__ import annotations

import math
from pathlib import Path

import numpy as np
import pandas as pd

from station.config.files import ConfigError
from station.config.limit_tables import load_limit_table
from station.config.sequence import load_sequence
from station.judge.budget import Application, PartFigures
from station.kinds.base import KindContext
from station.kinds.budget import ROWS, application_problem, budget_values
from station.review.load import DatalogError, text_codes

BUDGET_PARAMS = tuple(param for param, _ in ROWS)
DISTRIBUTION_COLUMNS = ["application", "parts", "none", "direct_p50", "direct_p99", "direct_max",
                        "rss_p50", "rss_p99", "rss_max"]


def lot_context(folder: Path, applications: tuple[Application, ...]) -> KindContext:
    """The tested span and regions of the lot in `folder`, from its copies of the applied files."""
    try:
        sequence = load_sequence(folder / "sequence.yaml")
        table = load_limit_table(folder / "limits.yaml")
    except ConfigError as exc:
        raise DatalogError(f"cannot read the lot's applied files: {exc.one_line()}", path=folder) from None
    return KindContext(sequence.span_v, table.regions, applications)


def check_against_lot(applications: tuple[Application, ...], results: pd.DataFrame,
                      context: KindContext, app_file: Path) -> None:
    """Refuse an application the lot's sweep cannot cover (ConfigError naming the app file)."""
    vcms = sorted(set(results.loc[results["PARAM"] == "vos_cm", "VCM"].dropna().astype(float)))
    if len(vcms) < 2:
        raise ConfigError(app_file, "the datalog has no common-mode sweep (vos_cm rows) to budget from")
    for app in applications:
        problem = application_problem(app, vcms, context)
        if problem:
            raise ConfigError(app_file, problem, hint="the lot was tested over "
                              f"{vcms[0]:+.3f} V to {vcms[-1]:+.3f} V of common mode at a {context.span_v:g} V span")


def part_figures(rows: pd.DataFrame) -> PartFigures:
    """One part's budget inputs from its result rows."""
    def figure(param: str) -> float:
        values = rows.loc[rows["PARAM"] == param, "RESULT"]
        return float(values.iloc[-1]) if len(values) else math.nan

    sweep = rows[rows["PARAM"] == "vos_cm"]
    points = tuple(zip(sweep["VCM"].astype(float), sweep["RESULT"].astype(float), strict=True))
    return PartFigures(vos=figure("vos"), aol_slope=figure("aol_slope"), cm_points=points,
                       ib_plus=figure("ib_plus"), ib_minus=figure("ib_minus"))


def datalog_budgets(results: pd.DataFrame, context: KindContext) -> pd.DataFrame:
    """One row per measured part and application: PART_ID, SITE_NUM, application and every
    budget value (V). Parts that were never swept (no contact) are left out."""
    rows = []
    swept = results[results["PARAM"] == "vos_cm"]["PART_ID"].unique()
    mine = results[results["PART_ID"].isin(swept)]
    for part_id, part_rows in mine.groupby("PART_ID", sort=False, observed=True):
        figures = part_figures(part_rows)
        site = int(part_rows["SITE_NUM"].iloc[0])
        for app in context.applications:
            rows.append({"PART_ID": part_id, "SITE_NUM": site, "application": app.name,
                         **budget_values(app, figures, context)})
    return pd.DataFrame(rows, columns=["PART_ID", "SITE_NUM", "application", *BUDGET_PARAMS])


def budget_distribution(budgets: pd.DataFrame) -> pd.DataFrame:
    """Per application: parts, parts without a budget, and p50/p99/max of the direct sum and RSS."""
    out = []
    for app, group in budgets.groupby("application", sort=False, observed=True):
        direct, rss = group["app_err"].to_numpy(float), group["app_err_rss"].to_numpy(float)
        ok = np.isfinite(direct)
        out.append({"application": app, "parts": len(group), "none": int((~ok).sum()),
                    **_spread("direct", direct[ok]), **_spread("rss", rss[np.isfinite(rss)])})
    return pd.DataFrame(out, columns=DISTRIBUTION_COLUMNS)


def logged_budgets(results: pd.DataFrame) -> pd.DataFrame:
    """The budget rows a lot logged (its sequence's budget test), as `datalog_budgets` gives them."""
    keyed = results[["PART_ID", "SITE_NUM", "REGION", "PARAM", "RESULT"]]   # not every column: a million rows
    rows = keyed[keyed["PARAM"].isin(BUDGET_PARAMS)]
    if rows.empty:
        return pd.DataFrame(columns=["PART_ID", "SITE_NUM", "application", *BUDGET_PARAMS])
    # Integer keys: de-duplicating and pivoting a third of a million rows of text is slow.
    part_codes, part_ids = pd.factorize(rows["PART_ID"].astype(str))
    region_codes, regions = text_codes(rows["REGION"])
    param_codes, params = text_codes(rows["PARAM"])
    keys = ["part", "site", "region", "param"]
    coded = pd.DataFrame({"part": part_codes, "site": rows["SITE_NUM"].to_numpy(), "region": region_codes,
                          "param": param_codes, "value": rows["RESULT"].to_numpy(dtype=float)})
    last = coded.drop_duplicates(subset=keys, keep="last")   # a retested part: its final rows
    wide = last.pivot(index=keys[:3], columns="param", values="value")
    where = wide.index.to_frame(index=False)
    out = pd.DataFrame({"PART_ID": part_ids.take(where["part"].to_numpy()), "SITE_NUM": where["site"].to_numpy(),
                        "application": regions[where["region"].to_numpy()]})
    by_name = dict(zip(params[wide.columns.to_numpy()], wide.columns, strict=True))
    for param in BUDGET_PARAMS:
        out[param] = wide[by_name[param]].to_numpy() if param in by_name else math.nan
    return out.sort_values(["PART_ID", "SITE_NUM", "application"], kind="stable", ignore_index=True)


def _spread(prefix: str, values: np.ndarray) -> dict[str, float]:
    if not len(values):
        return {f"{prefix}_p50": math.nan, f"{prefix}_p99": math.nan, f"{prefix}_max": math.nan}
    return {f"{prefix}_p50": float(np.percentile(values, 50)), f"{prefix}_p99": float(np.percentile(values, 99)),
            f"{prefix}_max": float(np.max(values))}

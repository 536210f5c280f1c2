"""Is one test site different from the others by more than chance?

Counts of good and failed parts per site form a sites x (good, failed) table. The test of
independence on it asks whether yield depends on the site:

- 2 sites: Fisher's exact test on the 2x2 table (exact at any count).
- 3 or more sites: Pearson's chi-squared test of independence; when an expected count is
  below 5 the chi-squared approximation is poor, so Fisher's exact test on the whole table is
  used instead, its p-value estimated by a seeded Monte Carlo (reproducible run to run).

Each site is also compared with all the others pooled (Fisher's exact test on its 2x2 table).
To point at the site that differs (and not at a good site that merely looks better than a pool
holding the bad one), sites are flagged one at a time: while the test of independence over
the remaining sites gives p < 0.01, the remaining site with the smallest p against the rest is
flagged and set aside.
"""

from __future__ import annotations

from dataclasses import dataclass

import numpy as np
import pandas as pd
from scipy import stats

FLAG_P = 0.01
MONTE_CARLO_RESAMPLES = 20_000
MONTE_CARLO_SEED = 20261201


@dataclass(frozen=True)
class SiteTest:
    method: str          # which test was used, in words
    statistic: float     # chi-squared statistic, or the odds ratio / table probability for Fisher
    p_value: float
    flagged: bool        # p < FLAG_P

    def describe(self) -> str:
        if np.isnan(self.p_value):
            return self.method
        verdict = "sites differ (p < 0.01)" if self.flagged else "no site difference beyond chance"
        return f"{self.method}: p = {self.p_value:.3g}, {verdict}"


def site_difference(good: np.ndarray, failed: np.ndarray) -> SiteTest:
    """Test of independence of site and pass/fail; `good[i]`, `failed[i]` count site i."""
    table = np.column_stack([np.asarray(good, dtype=np.int64), np.asarray(failed, dtype=np.int64)])
    table = table[table.sum(axis=1) > 0]
    if len(table) < 2:
        return SiteTest("no test: fewer than 2 sites with parts", np.nan, np.nan, False)
    if (table.sum(axis=0) == 0).any():
        return SiteTest("no test: every part passed, or every part failed", np.nan, np.nan, False)
    if len(table) == 2:
        result = stats.fisher_exact(table)
        return _test("Fisher's exact test (2 sites)", result.statistic, result.pvalue)
    chi2 = stats.chi2_contingency(table, correction=False)
    if (chi2.expected_freq < 5).any():
        method = stats.MonteCarloMethod(n_resamples=MONTE_CARLO_RESAMPLES,
                                        rng=np.random.default_rng(MONTE_CARLO_SEED))
        result = stats.fisher_exact(table, method=method)
        return _test(f"Fisher's exact test ({len(table)} sites, small counts; Monte Carlo p)",
                     result.statistic, result.pvalue)
    return _test(f"chi-squared test of independence ({len(table)} sites)", chi2.statistic, chi2.pvalue)


def site_vs_rest(good: np.ndarray, failed: np.ndarray) -> np.ndarray:
    """p-value of each site against all other sites pooled (Fisher's exact test, 2x2)."""
    good = np.asarray(good, dtype=np.int64)
    failed = np.asarray(failed, dtype=np.int64)
    p = np.full(len(good), np.nan)
    if len(good) < 2:
        return p
    for i in range(len(good)):
        rest_good, rest_failed = good.sum() - good[i], failed.sum() - failed[i]
        table = np.array([[good[i], failed[i]], [rest_good, rest_failed]])
        if (table.sum(axis=0) == 0).any() or (table.sum(axis=1) == 0).any():
            continue
        p[i] = stats.fisher_exact(table).pvalue
    return p


def site_table(parts: pd.DataFrame) -> tuple[pd.DataFrame, SiteTest]:
    """Per-site tested/good/failed/yield with each site's p against the rest, and the overall test."""
    decided = parts[parts["PASS"].notna()]
    counts = decided.groupby("SITE_NUM")["PASS"].agg(good="sum", decided="size")
    tested = parts.groupby("SITE_NUM").size().rename("tested")
    table = pd.concat([tested, counts], axis=1).fillna(0)
    table = table.reset_index().rename(columns={"SITE_NUM": "site"})
    return site_table_from_counts(table)


def site_table_from_counts(counts: pd.DataFrame) -> tuple[pd.DataFrame, SiteTest]:
    """The same from counts per site (columns site, tested, good, decided; sorted by site), as a
    database computes them (station/store)."""
    table = counts.set_index("site")[["tested", "good", "decided"]].astype(float)
    table["good"] = table["good"].astype(int)
    table["failed"] = (table["decided"] - table["good"]).astype(int)
    table["faults"] = (table["tested"] - table["decided"]).astype(int)
    table["yield"] = table["good"] / table["decided"].where(table["decided"] > 0)
    table["p_vs_rest"] = site_vs_rest(table["good"].to_numpy(), table["failed"].to_numpy())
    table["differs"] = flag_sites(table["good"].to_numpy(), table["failed"].to_numpy())
    table = table.drop(columns="decided").reset_index()
    test = site_difference(table["good"].to_numpy(), table["failed"].to_numpy())
    return table, test


def flag_sites(good: np.ndarray, failed: np.ndarray) -> np.ndarray:
    """Sites that differ: set aside one by one while the remaining sites still differ."""
    good, failed = np.asarray(good, dtype=np.int64), np.asarray(failed, dtype=np.int64)
    flagged = np.zeros(len(good), dtype=bool)
    while (~flagged).sum() >= 2:
        keep = np.flatnonzero(~flagged)
        if not site_difference(good[keep], failed[keep]).flagged:
            break
        p = site_vs_rest(good[keep], failed[keep])
        if np.all(np.isnan(p)) or np.nanmin(p) >= FLAG_P:
            break
        flagged[keep[int(np.nanargmin(p))]] = True
    return flagged


def _test(method: str, statistic: object, p_value: object) -> SiteTest:
    # scipy's Monte Carlo Fisher test hands back one-element arrays on some small tables.
    stat, p = (float(np.asarray(x, dtype=float).item()) for x in (statistic, p_value))
    return SiteTest(method, stat, p, bool(p < FLAG_P))

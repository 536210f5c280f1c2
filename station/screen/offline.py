"""`station pat`: dynamic PAT over whole lots, offline. Per datalog: limits from all of the
lot's parts that passed a grade (median +- k robust sigma, never looser than the loosest
grade), then the lot re-binned with them through the rebin machinery (station/review/rebin.py):
the outliers and the bin moves re-binning them would make."""

from __future__ import annotations

from dataclasses import dataclass, replace

import numpy as np

from station.config.limit_tables import BinDef, Limit, LimitTable
from station.review.load import Datalogs, computed_rows
from station.review.rebin import RebinResult, rebin
from station.screen.pat_limits import PatError, clipped_window
from station.screen.pat_table import MIN_BASELINE, PatLayer

DYNAMIC_NAME = "Dynamic PAT outlier"


@dataclass
class OfflinePat:
    table: LimitTable          # the datalog's table with the lot's dynamic limits as its PAT layer
    limits: list[Limit]
    counts: dict[tuple[str, str | None], int]
    result: RebinResult

    def outliers(self, logs: Datalogs) -> list[tuple[str, int, str, float, float | None, float | None]]:
        """(part id, site, figure, value, low, high) of each part the re-bin sends to the PAT bin."""
        assert self.table.pat is not None
        after = self.result.after
        moved = after[(after["HARD_BIN"] == self.table.pat.hard_bin) & after["FAIL_TEST"].notna()]
        results = logs.results
        by_figure = {(lim.param, lim.region or ""): lim for lim in self.limits}
        out = []
        for row in moved.itertuples():
            hit = results[(results["PART_SEQ"] == row.PART_SEQ) & (results["TEST_NUM"] == int(row.FAIL_TEST))]
            if hit.empty:
                continue
            param, region = str(hit["PARAM"].iat[0]), str(hit["REGION"].iat[0])
            lim = by_figure.get((param, region))
            out.append((str(row.PART_ID), int(row.SITE_NUM), f"{param} {region}".strip(),
                        float(hit["RESULT"].iat[0]), lim.low if lim else None, lim.high if lim else None))
        return out


def offline_pat(logs: Datalogs, table: LimitTable, k: float, min_parts: int = MIN_BASELINE) -> OfflinePat:
    """Dynamic PAT limits of one datalog's lot and the lot re-binned with them."""
    if table.pat is None:
        raise PatError(f"{table.source}: the limit table has no pat: section (the hard bin outliers go to); "
                       "give --limits with a table that has one")
    pat = table.pat
    soft = pat.dynamic.soft_bin if pat.dynamic is not None else max(table.soft_bins) + 1
    name = pat.soft_bins[soft].name if soft in pat.soft_bins else DYNAMIC_NAME
    parts = logs.parts
    graded = parts.loc[(parts["PASS"] == 1) | (parts["HARD_BIN"] == pat.hard_bin), "PART_SEQ"]
    rows = computed_rows(logs.results)
    rows = rows[rows["PART_SEQ"].isin(graded)]
    limits, counts, short = [], {}, []
    for spec in table.loosest.limits:
        mask = (rows["PARAM"].astype(str) == spec.param) & (rows["REGION"].astype(str) == (spec.region or ""))
        data = rows.loc[mask, "RESULT"].to_numpy()
        n = int(np.isfinite(data).sum())
        label = spec.param + (f" {spec.region}" if spec.region else "")
        if n < min_parts:
            short.append(f"{label}: {n}")
            continue
        _m, _s, low, high = clipped_window(data, spec.param, k, spec.low, spec.high)
        limits.append(Limit(spec.param, spec.region, low, high, spec.units, soft, name))
        counts[(spec.param, spec.region)] = n
    if short:
        raise PatError(f"{logs.folders[0]}: too few graded parts for dynamic PAT ({', '.join(short)}); "
                       f"at least {min_parts} per figure are needed")
    layer = PatLayer(pat.hard_bin, tuple(limits), None, {}, {soft: BinDef(soft, name, False)})
    soft_bins = dict(sorted({**{n: b for n, b in table.soft_bins.items() if n not in pat.soft_bins},
                             soft: BinDef(soft, name, False)}.items()))
    screened = replace(table, pat=layer, soft_bins=soft_bins)
    return OfflinePat(screened, limits, counts, rebin(logs, screened))

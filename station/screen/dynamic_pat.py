"""PAT during a lot: static limits from the table, and dynamic limits from a baseline.

The baseline is the lot's first N passing parts (N in the table's pat.dynamic, at least 30)
or, when given, a previous lot's passing parts. Once it is complete, median +- k robust sigma
per figure (never looser than the loosest grade) screens every later passing part. The
baseline parts were sorted before the limits existed: at the end of the lot they are checked
against them, and those outside make the re-screen list (lot.json pat.rescreen, shown by
`station summary`). The limits, the part they apply from, the outliers and the re-screen list
are kept in lot.json `pat`; every result row of a screened figure carries the window the part
was screened with (PAT_LO/PAT_HI), and the row of the figure that made a part an outlier also
carries it as its limit (LO_LIMIT/HI_LIMIT, PASS 0, GRADE "PAT").
"""

from __future__ import annotations

from dataclasses import dataclass, field
from typing import Any

import numpy as np

from station.config.limit_tables import Limit, LimitTable
from station.judge.grading import Result, Verdict
from station.screen.pat_apply import pat_break, pat_verdict
from station.screen.pat_limits import clipped_window


@dataclass
class _BaselinePart:
    part_id: str
    site: int
    results: list[Result]


def dynamic_figures(table: LimitTable) -> list[Limit]:
    """The loosest grade's limits whose figures dynamic PAT screens."""
    assert table.pat is not None and table.pat.dynamic is not None
    wanted = table.pat.dynamic.params
    return [lim for lim in table.loosest.limits if wanted is None or lim.param in wanted]


def limits_from(values: dict[tuple[str, str | None], list[float]], table: LimitTable) -> list[Limit]:
    """Dynamic PAT limits from per-figure values (figures with fewer than 2 finite values get none)."""
    assert table.pat is not None and table.pat.dynamic is not None
    d = table.pat.dynamic
    name = table.pat.soft_bins[d.soft_bin].name
    out = []
    for spec in dynamic_figures(table):
        data = np.asarray(values.get((spec.param, spec.region), []), dtype=float)
        if np.isfinite(data).sum() < 2:
            continue
        _median, _sigma, low, high = clipped_window(data, spec.param, d.sigma, spec.low, spec.high)
        out.append(Limit(spec.param, spec.region, low, high, spec.units, d.soft_bin, name))
    return out


@dataclass
class LotPat:
    """The PAT state of one lot on the bench."""

    table: LimitTable
    preset: list[Limit] | None = None            # from a previous lot: no in-lot baseline
    preset_source: str = ""
    baseline: list[_BaselinePart] = field(default_factory=list)
    limits: list[Limit] | None = None
    from_part: str = ""
    outliers: list[dict[str, Any]] = field(default_factory=list)
    used: list[Limit] = field(default_factory=list)   # the PAT limits the last part was screened with

    def __post_init__(self) -> None:
        if self.preset is not None:
            self.limits = self.preset

    @property
    def active(self) -> bool:
        return self.table.pat is not None

    @property
    def dynamic(self) -> bool:
        return self.table.pat is not None and self.table.pat.dynamic is not None

    def screen(self, part_id: str, site: int, verdict: Verdict, results: list[Result]) -> tuple[Verdict, bool]:
        """(the part's verdict after PAT, whether the baseline became complete with this part)."""
        pat = self.table.pat
        self.used = []
        if pat is None or verdict.passed is not True:
            return verdict, False
        self.used = list(pat.limits)
        after = pat_verdict(verdict, results, pat.limits, self.table, "static")
        if after is not verdict:
            self._note(part_id, site, after, "static")
            return after, False
        if not self.dynamic:
            return verdict, False
        if self.limits is None:
            self.baseline.append(_BaselinePart(part_id, site, list(results)))
            assert pat.dynamic is not None
            if len(self.baseline) >= pat.dynamic.baseline:
                self.limits = limits_from(self._baseline_values(), self.table)
                return verdict, True
            return verdict, False
        if not self.from_part:
            self.from_part = part_id
        self.used += self.limits
        after = pat_verdict(verdict, results, self.limits, self.table, "dynamic")
        if after is not verdict:
            self._note(part_id, site, after, "dynamic")
        return after, False

    def _note(self, part_id: str, site: int, verdict: Verdict, kind: str) -> None:
        check = verdict.failing
        assert check is not None and check.limit is not None
        self.outliers.append({"part": part_id, "site": site, "kind": kind, "param": check.result.param,
                              "region": check.result.region, "value": check.result.value,
                              "low": check.limit.low, "high": check.limit.high, "soft_bin": verdict.soft_bin})

    def _baseline_values(self) -> dict[tuple[str, str | None], list[float]]:
        values: dict[tuple[str, str | None], list[float]] = {}
        for part in self.baseline:
            for r in part.results:
                values.setdefault((r.param, r.region), []).append(r.value)
        return values

    def rescreen(self) -> list[dict[str, Any]]:
        """Baseline parts outside the dynamic limits computed from them (they were sorted already)."""
        if self.limits is None or self.preset is not None:
            return []
        out = []
        for part in self.baseline:
            broken = pat_break(part.results, self.limits)
            if broken is not None and broken.limit is not None:
                out.append({"part": part.part_id, "site": part.site, "param": broken.result.param,
                            "region": broken.result.region, "value": broken.result.value,
                            "low": broken.limit.low, "high": broken.limit.high})
        return out

    def lot_json(self, final: bool = False) -> dict[str, Any]:
        pat = self.table.pat
        if pat is None:
            return {}
        out: dict[str, Any] = {"hard_bin": pat.hard_bin,
                               "static": {"limits": [_limit_json(lim) for lim in pat.limits]},
                               "outliers": self.outliers}
        if pat.dynamic is not None:
            d = pat.dynamic
            dyn: dict[str, Any] = {"sigma": d.sigma, "soft_bin": d.soft_bin,
                                   "baseline": self.preset_source or f"first {d.baseline} passing parts of the lot",
                                   "baseline_parts": [p.part_id for p in self.baseline],
                                   "from_part": self.from_part,
                                   "limits": [] if self.limits is None else
                                   [{**_limit_json(lim), "count": len(self.baseline) or None} for lim in self.limits]}
            out["dynamic"] = dyn
            if final:
                out["rescreen"] = self.rescreen()
        return out

    def restore(self, earlier: dict[str, Any], results_of: dict[str, tuple[int, list[Result]]]) -> None:
        """A resumed lot: the outliers, baseline and limits of the earlier sessions."""
        self.outliers = list(earlier.get("outliers", []))
        dyn = earlier.get("dynamic") or {}
        ids = [str(p) for p in dyn.get("baseline_parts", [])]
        self.baseline = [_BaselinePart(pid, *results_of.get(pid, (0, []))) for pid in ids]
        self.from_part = str(dyn.get("from_part", ""))
        if dyn.get("limits") and self.preset is None:
            self.limits = [_limit_of(d, self.table) for d in dyn["limits"]]


def _limit_json(lim: Limit) -> dict[str, Any]:
    return {"param": lim.param, "region": lim.region, "low": lim.low, "high": lim.high, "units": lim.units,
            "soft_bin": lim.soft_bin}


def _limit_of(d: dict[str, Any], table: LimitTable) -> Limit:
    assert table.pat is not None and table.pat.dynamic is not None
    soft = int(d["soft_bin"])
    return Limit(str(d["param"]), d.get("region"), d.get("low"), d.get("high"), str(d.get("units", "")), soft,
                 table.pat.soft_bins[soft].name if soft in table.pat.soft_bins else "Dynamic PAT outlier")

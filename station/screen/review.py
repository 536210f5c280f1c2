"""What lot control and PAT did in a lot, as `station summary` shows it: the alarms with their
evidence, the PAT limits used, the outliers, and the re-screen list (baseline parts of
dynamic PAT that the lot's limits flag after they were sorted). Read from lot.json only."""

from __future__ import annotations

from dataclasses import dataclass

import pandas as pd
from rich.table import Table

from station.config.parameters import PARAMETERS
from station.review.load import Datalogs
from station.review.units import fmt

HEAD = "bold dark_cyan"
ALARM_COLUMNS = ["lot", "time", "rule", "action", "site", "parts", "evidence", "message"]
PAT_COLUMNS = ["lot", "part", "site", "kind", "param", "region", "value", "low", "high"]
LIMIT_COLUMNS = ["lot", "kind", "param", "region", "low", "high", "count", "from_part"]


@dataclass
class ScreenReview:
    alarms: pd.DataFrame
    limits: pd.DataFrame
    outliers: pd.DataFrame
    rescreen: pd.DataFrame

    @property
    def empty(self) -> bool:
        return self.alarms.empty and self.limits.empty and self.outliers.empty and self.rescreen.empty


def screen_review(logs: Datalogs) -> ScreenReview:
    alarms: list[list] = []
    limits: list[list] = []
    outliers: list[list] = []
    rescreen: list[list] = []
    for lot in logs.lots:
        lot_id = str(lot.get("lot_id", ""))
        for a in lot.get("alarms") or []:
            parts = [str(p) for p in a.get("parts", [])]
            evidence = ", ".join(parts[:6]) + (f" (+{len(parts) - 6})" if len(parts) > 6 else "")
            alarms.append([lot_id, a.get("time", ""), a.get("rule", ""), a.get("action", ""),
                           "" if a.get("site") is None else str(a.get("site")), len(parts), evidence,
                           a.get("message", "")])
        pat = lot.get("pat") or {}
        for kind in ("static", "dynamic"):
            for lim in (pat.get(kind) or {}).get("limits", []):
                limits.append([lot_id, kind, lim.get("param"), lim.get("region") or "", lim.get("low"),
                               lim.get("high"), lim.get("count"), (pat.get(kind) or {}).get("from_part", "")])
        for key, target in (("outliers", outliers), ("rescreen", rescreen)):
            for o in pat.get(key, []):
                target.append([lot_id, o.get("part"), o.get("site"), o.get("kind", key), o.get("param"),
                               o.get("region") or "", o.get("value"), o.get("low"), o.get("high")])
    return ScreenReview(pd.DataFrame(alarms, columns=ALARM_COLUMNS), pd.DataFrame(limits, columns=LIMIT_COLUMNS),
                        pd.DataFrame(outliers, columns=PAT_COLUMNS), pd.DataFrame(rescreen, columns=PAT_COLUMNS))


def _value(value: object, param: object) -> str:
    if value is None or (isinstance(value, float) and value != value):
        return ""
    units = PARAMETERS[str(param)].units if str(param) in PARAMETERS else ""
    return fmt(float(value), units, 5, True)  # type: ignore[arg-type]


def _table(title: str, columns: list[str]) -> Table:
    table = Table(title=title, title_style="bold", header_style=HEAD, title_justify="left")
    for c in columns:
        table.add_column(c)
    return table


def screen_tables(review: ScreenReview) -> list[Table]:
    tables = []
    if not review.alarms.empty:
        t = _table("Lot-control alarms (evidence: the parts that raised them)",
                   ["lot", "time", "rule", "action", "site", "parts", "evidence", "message"])
        for row in review.alarms.itertuples(index=False):
            t.add_row(*[str(v) for v in row])
        tables.append(t)
    if not review.limits.empty:
        t = _table("PAT limits used", ["lot", "kind", "figure", "low", "high", "baseline parts", "from part"])
        for r in review.limits.itertuples(index=False):
            t.add_row(r.lot, r.kind, f"{r.param} {r.region}".strip(), _value(r.low, r.param), _value(r.high, r.param),
                      "" if r.count is None or r.count != r.count else str(r.count), str(r.from_part or ""))
        tables.append(t)
    for frame, title in ((review.outliers, "PAT outliers (sorted to the PAT bin)"),
                         (review.rescreen, "Re-screen list: baseline parts outside the lot's dynamic PAT limits "
                                           "(already sorted: pull them from their bin)")):
        if frame.empty:
            continue
        t = _table(f"{title}: {len(frame)}", ["lot", "part", "site", "kind", "figure", "value", "low", "high"])
        for r in frame.itertuples(index=False):
            t.add_row(r.lot, str(r.part), str(r.site), str(r.kind), f"{r.param} {r.region}".strip(),
                      _value(r.value, r.param), _value(r.low, r.param), _value(r.high, r.param))
        tables.append(t)
    return tables

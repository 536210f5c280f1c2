"""PAT in the lot loop: a finished part's outcome after PAT (its verdict, the PAT window on
every result row of a screened figure, and the row of the figure that made it an outlier),
and the baseline's results read back on a resume."""

from __future__ import annotations

from dataclasses import replace
from typing import Any

from station.config.limit_tables import Limit
from station.datalog.folder import RESULT_COLUMNS
from station.datalog.writer import ResultRow
from station.judge.grading import Result
from station.lot.index_screen import PartOutcome
from station.screen.dynamic_pat import LotPat
from station.screen.pat_apply import PAT_GRADE

_R = {name: i for i, name in enumerate(RESULT_COLUMNS)}


def pat_outcome(pat: LotPat, outcome: PartOutcome) -> tuple[PartOutcome, bool]:
    """(the outcome after PAT, whether this part completed the dynamic baseline)."""
    verdict = outcome.verdict
    if not pat.active or verdict.passed is not True:
        return outcome, False
    results = [check.result for check in verdict.checks]
    after, ready = pat.screen(outcome.part_id, outcome.site, verdict, results)
    rows = with_windows(outcome.rows, pat.used)
    if after is verdict:
        return replace(outcome, rows=rows), ready
    broken = after.failing
    assert broken is not None and broken.limit is not None
    rows = [replace(row, low=broken.limit.low, high=broken.limit.high, passed=False, grade=PAT_GRADE)
            if row.test.test_num == broken.result.test_num else row for row in rows]
    return replace(outcome, verdict=after, rows=rows), ready


def with_windows(rows: list[ResultRow], used: list[Limit]) -> list[ResultRow]:
    """Each row of a figure with a PAT limit in `used`, with that window in PAT_LO/PAT_HI.
    A figure screened by static and dynamic limits gets both at once: the tighter side of
    each (a part inside both is inside that window, and only then)."""
    windows: dict[tuple[str, str | None], tuple[float | None, float | None]] = {}
    for lim in used:
        low, high = windows.get((lim.param, lim.region), (None, None))
        windows[(lim.param, lim.region)] = (_tighter(low, lim.low, max), _tighter(high, lim.high, min))
    out = []
    for row in rows:
        window = windows.get((row.test.param, row.test.region or None))
        out.append(row if window is None else replace(row, pat_low=window[0], pat_high=window[1]))
    return out


def _tighter(a: float | None, b: float | None, pick: Any) -> float | None:
    return b if a is None else a if b is None else pick(a, b)


def results_by_part(result_rows: list[list[str]], ids: set[str]) -> dict[str, tuple[int, list[Result]]]:
    """Site and logged figures of the parts `ids` (last test of each), from results.csv rows."""
    out: dict[str, tuple[int, list[Result]]] = {}
    last_block: dict[str, int] = {}
    for n, row in enumerate(result_rows):
        pid = row[_R["PART_ID"]]
        if pid not in ids:
            continue
        if last_block.get(pid, n - 1) != n - 1 or pid not in out:   # a later test starts again
            out[pid] = (int(row[_R["SITE_NUM"]]), [])
        last_block[pid] = n
        out[pid][1].append(Result(row[_R["PARAM"]], row[_R["REGION"]] or None,
                                              float(row[_R["RESULT"]]), int(row[_R["TEST_NUM"]])))
    return out


def earlier_pat(header: dict[str, Any]) -> dict[str, Any]:
    pat = header.get("pat")
    return pat if isinstance(pat, dict) else {}

"""A part that passed a grade, checked against PAT limits: inside, it keeps its verdict;
outside any (the first in execution order), it goes to the table's PAT hard bin with the
limit's soft bin. Pure functions; used on the bench (lot loop) and offline (rebin)."""

from __future__ import annotations

from collections.abc import Sequence

from station.config.limit_tables import Limit, LimitTable
from station.judge.grading import Check, Result, Verdict, check_value

PAT_GRADE = "PAT"   # GRADE of a result row that carries a PAT limit (results.csv)


def pat_break(results: Sequence[Result], limits: Sequence[Limit]) -> Check | None:
    """The first result outside its PAT limit, as a failed check; None if every one is inside."""
    by_key = {(lim.param, lim.region): lim for lim in limits}
    for result in results:
        limit = by_key.get((result.param, result.region))
        if limit is not None and not check_value(result.value, limit):
            return Check(result, limit, False)
    return None


def pat_verdict(verdict: Verdict, results: Sequence[Result], limits: Sequence[Limit],
                table: LimitTable, kind: str = "static") -> Verdict:
    """`verdict` unchanged unless the part passed and breaks a PAT limit."""
    if verdict.passed is not True or not limits or table.pat is None:
        return verdict
    broken = pat_break(results, limits)
    if broken is None:
        return verdict
    assert broken.limit is not None
    hard = table.pat.hard_bin
    ships = table.hard_bins[hard].passing        # outliers ship only if the table says so
    return Verdict(verdict.grade if ships else None, hard, broken.limit.soft_bin, ships, verdict.decided_by,
                   verdict.checks, broken,
                   f"{kind} PAT outlier: {broken.limit.bin_name} (soft bin {broken.limit.soft_bin}), "
                   f"graded {verdict.grade}")

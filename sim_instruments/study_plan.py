"""Which part sits in which site at each index of a repeatability study.

Every part is measured `repeats` times in every site (a crossed design: parts x sites). The
parts go round the sites in blocks of `sites` parts: in one round each block is indexed once
per rotation, so each part visits each site once per round. With `reseat` false a part stays
seated for its repeats in one site (repeatability without handling); with `reseat` true every
measurement is a fresh seat (the part goes round the sites once per repeat).
"""

from __future__ import annotations

from dataclasses import dataclass


@dataclass(frozen=True)
class StudyPlan:
    """`indexes[i][k]`: the part (0-based index in the population) in site k+1 at index i."""

    parts: int
    repeats: int
    sites: int
    reseat: bool
    indexes: tuple[tuple[int | None, ...], ...]


def make_study_plan(parts: int, repeats: int, sites: int, reseat: bool = True) -> StudyPlan:
    if parts < 1 or repeats < 1 or sites < 1:
        raise ValueError("a study needs at least one part, one repeat and one site")
    blocks = [list(range(start, min(start + sites, parts))) for start in range(0, parts, sites)]
    indexes: list[tuple[int | None, ...]] = []
    rounds = repeats if reseat else 1
    again = 1 if reseat else repeats
    for _ in range(rounds):
        for block in blocks:
            padded: list[int | None] = [*block, *([None] * (sites - len(block)))]
            for turn in range(sites):
                seating = tuple(padded[(k + turn) % sites] for k in range(sites))
                indexes.extend([seating] * again)
    return StudyPlan(parts, repeats, sites, reseat, tuple(indexes))

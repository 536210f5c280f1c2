"""How much each benchmark mode runs: parts per lot, repetitions, sim speeds."""

from __future__ import annotations

import dataclasses
from dataclasses import dataclass


@dataclass(frozen=True)
class Sizes:
    name: str
    repeats: int            # timing figures are medians over this many runs
    timing_parts: int       # 1-site lots at speed 1 (floor ratio, adaptive vs fixed)
    multisite_parts: int    # 1-site and 4-site lots at speed 1
    timing_speed: float     # 1 for real figures; only the smoke test compresses time
    accuracy_parts: int     # 4-site lot scored against the truth (misbins, escapes, CMRR errors)
    compare_parts: int      # the fixed-settle lot whose accuracy is compared on the same parts
    accuracy_speed: float
    overhead_parts: int     # 4-site lot on the ideal bench
    writer_parts: int       # parts of 40 rows through the datalog writer
    summary_rows: int       # result rows of the datalog the review summary reads
    overhead_repeats: int   # the overhead figure is the noisiest and its lots are short
    round_trips: int = 2000  # *IDN? queries per transport (HiSLIP against raw socket)
    soak_first: int = 500    # the soak's RSS growth is from after this many parts ...
    soak_last: int = 10_000  # ... to after this many

    def as_dict(self) -> dict:
        return dataclasses.asdict(self)


SIZES = {
    "full": Sizes("full", 3, 12, 12, 1.0, 1000, 200, 10.0, 16, 2000, 1_000_000, 5),
    "quick": Sizes("quick", 1, 4, 4, 1.0, 60, 20, 10.0, 8, 500, 1_000_000, 5, soak_last=2000),
    "smoke": Sizes("smoke", 1, 2, 4, 5.0, 12, 8, 20.0, 4, 20, 20_000, 1, round_trips=100,
                   soak_first=8, soak_last=24),
}

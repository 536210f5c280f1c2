"""Static PAT limits from the passing parts of one or more datalogs (`station limits pat`).

Per figure (parameter and region) that the table's loosest grade limits: the finite values
of the parts that passed, their median and robust sigma (station/screen/robust.py), the
window median +- k robust sigma, clipped so that it is never looser than the data-sheet
(loosest grade) limits. Rejection figures in dB (cmrr, psrr) are screened on their low side
only: a slope near zero sends the dB value far up, so the upper tail is long for a good part
and says nothing of a bad one. The limits are written into the table's `pat:` section
(station/screen/pat_table.py), keeping the rest of the file as it is.
"""

from __future__ import annotations

import math
from dataclasses import dataclass
from datetime import UTC, datetime

import numpy as np
import pandas as pd

from station.config.files import ConfigError
from station.config.limit_tables import LimitTable, parse_limit_table
from station.config.quantities import format_quantity
from station.review.load import Datalogs, computed_rows
from station.screen.pat_table import MIN_BASELINE
from station.screen.robust import sigma_rel_se, window

LOW_SIDE_ONLY = frozenset({"cmrr", "psrr"})
FIRST_PAT_SOFT_BIN = 40


class PatError(Exception):
    """PAT limits cannot be computed or written; one line says why."""


@dataclass(frozen=True)
class PatFigure:
    param: str
    region: str | None
    units: str
    count: int            # finite values of passing parts
    median: float
    robust_sigma: float
    low: float | None     # the PAT limit as written (None: that side not screened)
    high: float | None
    spec_low: float | None
    spec_high: float | None
    flagged: int          # input parts (passing) that these limits would flag
    soft_bin: int
    bin_name: str

    @property
    def label(self) -> str:
        return self.param + (f" {self.region}" if self.region else "")


def figure_values(logs: Datalogs, passing_only: bool = True) -> pd.DataFrame:
    """PART_SEQ, PARAM, REGION, RESULT of the computed figures (of passing parts)."""
    rows = computed_rows(logs.results)
    if passing_only:
        good = logs.parts.loc[logs.parts["PASS"] == 1, "PART_SEQ"]
        rows = rows[rows["PART_SEQ"].isin(good)]
    out = pd.DataFrame({"PART_SEQ": rows["PART_SEQ"].to_numpy(), "PARAM": rows["PARAM"].astype(str).to_numpy(),
                        "REGION": rows["REGION"].astype(str).to_numpy(), "RESULT": rows["RESULT"].to_numpy()})
    return out


def clipped_window(values: np.ndarray, param: str, k: float, spec_low: float | None,
                   spec_high: float | None) -> tuple[float, float, float | None, float | None]:
    """(median, robust sigma, low, high): the PAT window, never looser than the spec."""
    w = window(values, k)
    low: float | None = w.low
    high: float | None = None if param in LOW_SIDE_ONLY else w.high
    if spec_low is not None and low is not None:
        low = max(low, spec_low)
    if spec_high is not None:
        high = spec_high if high is None else min(high, spec_high)
    return w.median, w.robust_sigma, low, high


def outside(values: np.ndarray, low: float | None, high: float | None) -> np.ndarray:
    """True where a value breaks the window (nan and over-range count as outside)."""
    v = np.asarray(values, dtype=float)
    bad = ~np.isfinite(v)
    if low is not None:
        bad |= v < low
    if high is not None:
        bad |= v > high
    return bad


def static_pat(logs: Datalogs, table: LimitTable, k: float, min_parts: int = MIN_BASELINE) -> list[PatFigure]:
    """PAT limits per figure of the table's loosest grade; PatError if any figure has too few parts."""
    if table.pat is None:
        raise PatError(f"{table.source}: the table has no pat: section; add one with the hard bin outliers go "
                       "to, e.g. 'pat: {hard_bin: 7}' and hard bin 7 {name: PAT outlier, pass: false} under "
                       "hard_bins (outliers ship only if that bin says pass: true)")
    values = figure_values(logs)
    taken = set(table.soft_bins) - set(table.pat.soft_bins)
    earlier = {(lim.param, lim.region): lim.soft_bin for lim in table.pat.limits}
    figures, short = [], []
    next_bin = FIRST_PAT_SOFT_BIN
    for spec in table.loosest.limits:
        mask = (values["PARAM"] == spec.param) & (values["REGION"] == (spec.region or ""))
        data = values.loc[mask, "RESULT"].to_numpy()
        finite = data[np.isfinite(data)]
        label = spec.param + (f" {spec.region}" if spec.region else "")
        if finite.size < min_parts:
            short.append(f"{label}: {finite.size}")
            continue
        median, sigma, low, high = clipped_window(finite, spec.param, k, spec.low, spec.high)
        soft = earlier.get((spec.param, spec.region))
        if soft is None:
            while next_bin in taken:
                next_bin += 1
            soft = next_bin
        taken.add(soft)
        figures.append(PatFigure(spec.param, spec.region, spec.units, int(finite.size), median, sigma, low, high,
                                 spec.low, spec.high, int(outside(data, low, high).sum()), soft,
                                 f"PAT {spec.bin_name}"))
    if short:
        raise PatError(f"too few passing parts for PAT ({', '.join(short)}); at least {min_parts} per figure "
                       f"are needed: the robust sigma of n parts is uncertain by about 1.17/sqrt(n) "
                       f"({100 * sigma_rel_se(min_parts):.0f} % at {min_parts}), so fewer parts give limits "
                       "that move from lot to lot more than the population does; give more lots")
    return figures


def parts_flagged(logs: Datalogs, figures: list[PatFigure]) -> int:
    """Distinct passing input parts that any of the figures would flag."""
    values = figure_values(logs)
    flagged: set[int] = set()
    for f in figures:
        mask = (values["PARAM"] == f.param) & (values["REGION"] == (f.region or ""))
        sub = values[mask]
        flagged |= set(sub.loc[outside(sub["RESULT"].to_numpy(), f.low, f.high), "PART_SEQ"].tolist())
    return len(flagged)


# ---- writing the layer ------------------------------------------------------------------------

def pat_section(table: LimitTable, figures: list[PatFigure], k: float, logs: Datalogs) -> str:
    """The `pat:` section text for `figures`, keeping the table's hard bin and dynamic settings."""
    assert table.pat is not None
    lines = ["pat:                     # outlier screening (written by `station limits pat`)",
             f"  hard_bin: {table.pat.hard_bin}", "  limits:"]
    for f in figures:
        cells = [f"param: {f.param}"] + ([f"region: {f.region}"] if f.region else [])
        if f.low is not None:
            cells.append(f"low: {_q(f.low, f.units)}")
        if f.high is not None:
            cells.append(f"high: {_q(f.high, f.units)}")
        cells += [f"soft_bin: {f.soft_bin}", f'bin: "{f.bin_name}"']
        lines.append("    - {" + ", ".join(cells) + "}")
    d = table.pat.dynamic
    if d is not None:
        dyn_bin = table.pat.soft_bins[d.soft_bin].name
        lines += ["  dynamic:", f"    baseline: {d.baseline}", f"    sigma: {d.sigma:g}",
                  f"    soft_bin: {d.soft_bin}", f'    bin: "{dyn_bin}"']
        if d.params:
            lines.append(f"    params: [{', '.join(d.params)}]")
    lots = sorted({str(lot.get("lot_id")) for lot in logs.lots})
    passing = int((logs.parts["PASS"] == 1).sum())
    lines += ["  basis:", f"    sigma: {k:g}", f"    passing_parts: {passing}",
              f"    lots: [{', '.join(_yaml_text(x) for x in lots)}]",
              f"    computed: '{datetime.now(UTC).strftime('%Y-%m-%dT%H:%M:%SZ')}'",
              "    method: median +- sigma x IQR/1.35 of passing parts, clipped to the loosest grade"]
    return "\n".join(lines) + "\n"


def with_pat_section(text: str, section: str) -> str:
    """The table text with its top-level `pat:` block (if any) replaced by `section`."""
    kept: list[str] = []
    skipping = False
    for line in text.splitlines(keepends=True):
        top = bool(line) and not line[0].isspace() and not line.startswith("#")
        if top:
            skipping = line.startswith("pat:")
        if not skipping:
            kept.append(line)
    body = "".join(kept).rstrip("\n") + "\n\n"
    return body + section


def write_pat_table(table: LimitTable, text: str, figures: list[PatFigure], k: float, logs: Datalogs,
                    out_name: str) -> tuple[str, LimitTable]:
    """(new table text, the new table read back): refuses a text that does not read back."""
    new_text = with_pat_section(text, pat_section(table, figures, k, logs))
    try:
        new = parse_limit_table(new_text, out_name)
    except ConfigError as exc:   # a slip of ours: say so rather than write a broken table
        raise PatError(f"the table with PAT limits does not read back: {exc.one_line()}") from None
    return new_text, new


def _q(value: float, units: str) -> str:
    text = format_quantity(value, units)
    return text if math.isfinite(value) else f"'{text}'"


def _yaml_text(value: str) -> str:
    return "'" + value.replace("'", "''") + "'"

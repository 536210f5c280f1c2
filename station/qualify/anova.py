"""Crossed two-way ANOVA of a gauge study (parts x appraisers, with interaction) and its
variance components.

An "appraiser" here is a site of the station, or a (station, site) pair when several
stations' studies are merged. The sums of squares are the textbook ones of a balanced
crossed random-effects design; the components come from the expected mean squares:

    repeatability   s_e^2   = MS_E
    interaction     s_pa^2  = (MS_PA - MS_E) / r
    appraiser       s_a^2   = (MS_A - MS_PA) / (p r)
    part            s_p^2   = (MS_P - MS_PA) / (a r)

a negative estimate is set to 0 (its true value is small against its sampling error). The
interaction is always kept (never pooled into repeatability). With one appraiser the design
is one-way: s_p^2 = (MS_P - MS_E) / r. Gauge-study practice (AIAG MSA manual, from memory).

The formulas need a balanced study: every part measured r times by every appraiser.
`balance` makes a study balanced explicitly (see its docstring) and says what it dropped.
"""

from __future__ import annotations

import math
from dataclasses import dataclass

import numpy as np
import pandas as pd

# Number of distinct categories: 1.41 PV / GRR, truncated (AIAG MSA, from memory).
NDC_FACTOR = 1.41


class StudyDataError(ValueError):
    """The study's data cannot give this figure's components (too few parts or sites left)."""


@dataclass(frozen=True)
class AnovaRow:
    df: int
    ss: float

    @property
    def ms(self) -> float:
        return self.ss / self.df if self.df > 0 else math.nan


@dataclass(frozen=True)
class Components:
    """Variances (units squared) of one figure's study."""

    part: float
    appraiser: float
    interaction: float
    repeatability: float

    @property
    def reproducibility(self) -> float:
        return self.appraiser + self.interaction

    @property
    def grr(self) -> float:
        """Standard deviation of the measurement system: sqrt(repeatability + reproducibility)."""
        return math.sqrt(self.repeatability + self.reproducibility)

    @property
    def pv(self) -> float:
        return math.sqrt(self.part)

    @property
    def ndc(self) -> int:
        if self.grr == 0:
            return 0
        return int(math.floor(NDC_FACTOR * self.pv / self.grr))


@dataclass(frozen=True)
class Anova:
    parts: int
    appraisers: int
    repeats: int
    part: AnovaRow
    appraiser: AnovaRow
    interaction: AnovaRow
    error: AnovaRow
    components: Components
    appraiser_means: dict[str, float]   # appraiser -> mean over parts and repeats
    grand_mean: float


@dataclass(frozen=True)
class Balanced:
    frame: pd.DataFrame            # columns part, appraiser, value
    repeats: int
    dropped_parts: tuple[str, ...]  # parts left out because a cell was short
    trimmed_cells: int              # cells that had more than `repeats` values (later ones left out)


def balance(frame: pd.DataFrame) -> Balanced:
    """Make the study balanced, explicitly.

    r is the count most cells have (the study's planned repeats). A cell (part, appraiser)
    with more than r values keeps its first r (a retest of the same presentation). A part with
    any cell short of r (a contact fail, an over-range reading) is left out of this figure
    altogether, rather than estimated: the components then stay the balanced-design ones.
    Raises StudyDataError when fewer than 2 parts or fewer than 2 repeats remain."""
    frame = frame[np.isfinite(frame["value"].to_numpy(dtype=float))]
    appraisers = sorted(frame["appraiser"].unique())
    parts = sorted(frame["part"].unique())
    counts = frame.groupby(["part", "appraiser"]).size()
    full = counts.reindex(pd.MultiIndex.from_product([parts, appraisers]), fill_value=0)
    if full.empty:
        raise StudyDataError("no finite values")
    repeats = int(full[full > 0].mode().iloc[0])
    short = sorted({p for (p, _), n in full.items() if n < repeats})
    trimmed = int((full > repeats).sum())
    kept = frame[~frame["part"].isin(short)]
    kept = kept.groupby(["part", "appraiser"], sort=False).head(repeats)
    if kept["part"].nunique() < 2:
        raise StudyDataError(f"{kept['part'].nunique()} part(s) measured {repeats} times in every site "
                             f"(parts left out: {', '.join(map(str, short)) or 'none'}); a study needs 2 or more")
    if repeats < 2:
        raise StudyDataError("each part was measured once per site: repeatability needs 2 or more repeats")
    return Balanced(kept.reset_index(drop=True), repeats, tuple(map(str, short)), trimmed)


def crossed_anova(frame: pd.DataFrame) -> Anova:
    """ANOVA of a balanced study: `frame` has columns part, appraiser, value (see `balance`)."""
    values = frame["value"].to_numpy(dtype=float)
    grand = float(values.mean())
    parts = frame["part"].nunique()
    appraisers = frame["appraiser"].nunique()
    cells = frame.groupby(["part", "appraiser"])["value"]
    sizes = cells.size()
    if sizes.nunique() != 1 or len(sizes) != parts * appraisers:
        raise StudyDataError("the study is not balanced (call balance first)")
    r = int(sizes.iloc[0])
    part_means = frame.groupby("part")["value"].mean()
    appraiser_means = frame.groupby("appraiser")["value"].mean()
    cell_means = cells.mean()
    ss_part = appraisers * r * float(((part_means - grand) ** 2).sum())
    ss_appraiser = parts * r * float(((appraiser_means - grand) ** 2).sum())
    p_idx = cell_means.index.get_level_values("part")
    a_idx = cell_means.index.get_level_values("appraiser")
    inter = (cell_means.to_numpy() - part_means.loc[p_idx].to_numpy()
             - appraiser_means.loc[a_idx].to_numpy() + grand)
    ss_inter = r * float((inter ** 2).sum())
    deviations = values - cells.transform("mean").to_numpy()
    ss_error = float((deviations ** 2).sum())
    part = AnovaRow(parts - 1, ss_part)
    appraiser = AnovaRow(appraisers - 1, ss_appraiser)
    interaction = AnovaRow((parts - 1) * (appraisers - 1), ss_inter)
    error = AnovaRow(parts * appraisers * (r - 1), ss_error)
    return Anova(parts, appraisers, r, part, appraiser, interaction, error,
                 _components(part, appraiser, interaction, error, parts, appraisers, r),
                 {str(k): float(v) for k, v in appraiser_means.items()}, grand)


def _components(part: AnovaRow, appraiser: AnovaRow, interaction: AnovaRow, error: AnovaRow,
                p: int, a: int, r: int) -> Components:
    ms_e = error.ms
    if a == 1:   # one site: one-way, no appraiser or interaction term
        return Components(max(0.0, (part.ms - ms_e) / r), 0.0, 0.0, ms_e)
    ms_pa = interaction.ms
    return Components(
        part=max(0.0, (part.ms - ms_pa) / (a * r)),
        appraiser=max(0.0, (appraiser.ms - ms_pa) / (p * r)),
        interaction=max(0.0, (ms_pa - ms_e) / r),
        repeatability=ms_e,
    )

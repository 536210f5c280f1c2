"""Seeded population of the fictional PX-401 op-amp (all figures invented for the demo).

Every part draws from its own generator seeded with (seed, index), so part k of a lot is the
same whatever the lot size; another seed gives another lot. Distributions: the table in
docs/methods.md, "The invented demo population".
"""

from __future__ import annotations

import math
from dataclasses import dataclass

import numpy as np

NOMINAL_SPAN_V = 10.0
DEFECT_KINDS = ("none", "open", "short", "outlier", "crossover", "pat_outlier")
# An in-spec outlier (for outlier screening): an offset of 100-140 uV, inside the loosest
# grade's +-150 uV but 7-9 sigma from the population's 15 uV (invented, like all of this).
PAT_OUTLIER_VOS_V = (100e-6, 140e-6)
# Cumulative defect shares: 1 % open, 0.5 % short, 1 % offset outlier, 0.5 % bad crossover.
_DEFECT_EDGES = ((0.010, "open"), (0.015, "short"), (0.025, "outlier"), (0.030, "crossover"))
IB_TYPICAL_A = 2.0e-12   # invented: a CMOS input's bias current at room temperature
LEAKY_SHARE = 0.015      # invented: 1.5 % of parts have one input leaking 20-100 pA
CMRR_CORNER_HZ = (100.0, 1000.0)   # invented: where each part's CMRR starts to roll off
WIDTH_10_90_PER_SCALE = 2.0 * math.log(9.0)  # logistic: 10-90 % width = 2 ln 9 * scale


@dataclass
class PartTruth:
    """True parameters of one simulated part. Offsets in V, slopes in V/V, times in s."""

    part_id: str
    index: int
    defect: str
    reseat_fixes: bool          # an open part that a HANDler:RESeat cures
    vos_low_v: float            # offset of the low input pair at VCM = 0, nominal span, Vout = 0
    cm_step_v: float            # offset step from the low to the high pair
    cmrr_low_vv: float          # dVos/dVCM of the low pair (signed)
    cmrr_high_vv: float         # dVos/dVCM of the high pair (signed)
    crossover_below_vplus_v: float  # crossover centre, volts below the upper rail
    crossover_width_v: float    # 10-90 % width of the hand-over
    aol_vv: float               # open-loop gain, unloaded
    psrr_vv: float              # dVos/dSpan (signed)
    iq_a: float                 # quiescent current at 10 V span
    noise_v_rthz: float         # white input noise density
    flicker_v: float            # 1/f floor: RMS per reading, independent of integration time
    tau_fast_s: float           # servo-loop settling time constant
    tau_slow_s: float           # thermal tail time constant
    thermal_v_per_v: float      # thermal tail amplitude, RTI volts per volt of rail/output step
    short_ohm: float            # rail-to-rail resistance of a shorted part (inf otherwise)
    ib_plus_a: float = 0.0      # input bias current into the + input (A, into the pin positive)
    ib_minus_a: float = 0.0     # input bias current into the - input
    leaky: bool = False         # an input with ESD-structure leakage far above the population
    cmrr_corner_hz: float = math.inf  # single-pole roll-off of the common-mode rejection
    binned_hard_bin: int | None = None
    site: int | None = None

    @property
    def crossover_vcm_v(self) -> float:
        """Crossover centre as VCM at the nominal 10 V span."""
        return self.crossover_vcm(NOMINAL_SPAN_V)

    def crossover_vcm(self, span_v: float) -> float:
        return span_v / 2.0 - self.crossover_below_vplus_v

    def cm_slope(self, vcm: float, span_v: float) -> float:
        """The signed DC common-mode slope dVos/dVcm at `vcm`: the two pairs' slopes blended
        as the offset is (the derivative of the step's blend is left out: a transition
        region is no place for a rejection figure)."""
        centre = self.crossover_vcm(span_v)
        scale = self.crossover_width_v / WIDTH_10_90_PER_SCALE
        x = (vcm - centre) / scale
        weight_high = 1.0 / (1.0 + math.exp(-x)) if x >= 0 else math.exp(x) / (1.0 + math.exp(x))
        return (1.0 - weight_high) * self.cmrr_low_vv + weight_high * self.cmrr_high_vv

    def iq(self, span_v: float) -> float:
        """Quiescent current; rises 1 %/V of span above 10 V (invented)."""
        return max(0.0, self.iq_a * (1.0 + 0.01 * (span_v - NOMINAL_SPAN_V)))


def _db_rejection(slope: float) -> float:
    return -20.0 * math.log10(abs(slope)) if slope else math.inf


def truth_row(part: PartTruth) -> dict[str, object]:
    """One row of sim_truth.csv."""
    return {
        "PART_ID": part.part_id,
        "DEFECT": part.defect,
        "RESEAT_FIXES": int(part.reseat_fixes),
        "VOS_LOW_V": part.vos_low_v,
        "CM_STEP_V": part.cm_step_v,
        "CMRR_LOW_VV": part.cmrr_low_vv,
        "CMRR_HIGH_VV": part.cmrr_high_vv,
        "CMRR_LOW_DB": _db_rejection(part.cmrr_low_vv),
        "CMRR_HIGH_DB": _db_rejection(part.cmrr_high_vv),
        "CROSSOVER_VCM_V": part.crossover_vcm_v,
        "CROSSOVER_WIDTH_V": part.crossover_width_v,
        "AOL_VV": part.aol_vv,
        "AOL_DB": 20.0 * math.log10(part.aol_vv),
        "PSRR_VV": part.psrr_vv,
        "PSRR_DB": _db_rejection(part.psrr_vv),
        "IQ_A": part.iq_a,
        "NOISE_V_RTHZ": part.noise_v_rthz,
        "FLICKER_V": part.flicker_v,
        "TAU_FAST_S": part.tau_fast_s,
        "TAU_SLOW_S": part.tau_slow_s,
        "THERMAL_V_PER_V": part.thermal_v_per_v,
        "IB_PLUS_A": part.ib_plus_a,
        "IB_MINUS_A": part.ib_minus_a,
        "IOS_A": part.ib_plus_a - part.ib_minus_a,
        "LEAKY": int(part.leaky),
        "CMRR_CORNER_HZ": part.cmrr_corner_hz,
        "BINNED_HARD_BIN": "" if part.binned_hard_bin is None else part.binned_hard_bin,
        "SITE": "" if part.site is None else part.site,
    }


TRUTH_COLUMNS = (
    "PART_ID", "DEFECT", "RESEAT_FIXES", "VOS_LOW_V", "CM_STEP_V", "CMRR_LOW_VV", "CMRR_HIGH_VV",
    "CMRR_LOW_DB", "CMRR_HIGH_DB", "CROSSOVER_VCM_V", "CROSSOVER_WIDTH_V", "AOL_VV", "AOL_DB",
    "PSRR_VV", "PSRR_DB", "IQ_A", "NOISE_V_RTHZ", "FLICKER_V", "TAU_FAST_S", "TAU_SLOW_S",
    "THERMAL_V_PER_V", "IB_PLUS_A", "IB_MINUS_A", "IOS_A", "LEAKY", "CMRR_CORNER_HZ", "BINNED_HARD_BIN", "SITE",
)


def make_part(seed: int, index: int, defects: bool = True) -> PartTruth:
    """Part number `index` (0-based) of the lot of `seed`; id D00001 for index 0."""
    rng = np.random.default_rng([seed, index])
    # Draw every parameter first, always in the same order, so switching defects on or off
    # changes only the defective parts.
    defect_draw = rng.random()
    reseat_fixes = bool(rng.random() < 0.5)
    vos_low = rng.normal(0.0, 15e-6)
    step = rng.normal(0.0, 60e-6)
    cmrr_low = rng.normal(0.0, 0.3e-6)
    cmrr_high = rng.normal(0.0, 1.5e-6)
    below_vplus = 1.3 + rng.normal(0.0, 0.05)
    width = float(np.clip(rng.normal(0.20, 0.015), 0.16, 0.24))
    aol = 3e6 * 10.0 ** (rng.normal(0.0, 2.0) / 20.0)
    psrr = rng.normal(0.0, 0.3e-6)
    iq = rng.normal(450e-6, 25e-6)
    noise = 15e-9 * math.exp(rng.normal(0.0, 0.08))
    flicker = 5e-9 * math.exp(rng.normal(0.0, 0.2))
    tau_fast = rng.uniform(2e-3, 3e-3)
    tau_slow = rng.uniform(25e-3, 40e-3)
    thermal = 0.3e-6 * math.exp(rng.normal(0.0, 0.25)) * (1 if rng.random() < 0.5 else -1)
    outlier_mag = rng.uniform(0.3e-3, 2e-3) * (1 if rng.random() < 0.5 else -1)
    bad_step = rng.uniform(0.5e-3, 1.5e-3) * (1 if rng.random() < 0.5 else -1)
    short_ohm = rng.uniform(150.0, 250.0)  # ~50 mA at 10 V
    # Input bias currents (invented, CMOS inputs at room temperature: a few pA, the two inputs
    # alike to within a fraction of a pA), drawn after every other figure so that earlier
    # parameters of a seed stay as they were. A small share has one leaky input.
    ib_common = rng.normal(IB_TYPICAL_A, 1.0e-12)
    ib_plus = ib_common + rng.normal(0.0, 0.4e-12)
    ib_minus = ib_common + rng.normal(0.0, 0.4e-12)
    leaky = bool(rng.random() < LEAKY_SHARE)
    leak = rng.uniform(20e-12, 100e-12)
    leak_on_plus = bool(rng.random() < 0.5)
    # The corner where the common-mode rejection starts to fall (invented: log-uniform from
    # CMRR_CORNER_HZ[0] to [1]), drawn last so every earlier figure of a seed stays as it was.
    corner = 10.0 ** rng.uniform(math.log10(CMRR_CORNER_HZ[0]), math.log10(CMRR_CORNER_HZ[1]))

    defect = "none"
    if defects:
        for edge, kind in _DEFECT_EDGES:
            if defect_draw < edge:
                defect = kind
                break
    part = PartTruth(
        part_id=f"D{index + 1:05d}", index=index, defect=defect,
        reseat_fixes=reseat_fixes if defect == "open" else False,
        vos_low_v=vos_low, cm_step_v=step, cmrr_low_vv=cmrr_low, cmrr_high_vv=cmrr_high,
        crossover_below_vplus_v=below_vplus, crossover_width_v=width, aol_vv=aol,
        psrr_vv=psrr, iq_a=iq, noise_v_rthz=noise, flicker_v=flicker,
        tau_fast_s=tau_fast, tau_slow_s=tau_slow, thermal_v_per_v=thermal,
        short_ohm=math.inf, ib_plus_a=ib_plus, ib_minus_a=ib_minus, leaky=leaky,
        cmrr_corner_hz=corner)
    if leaky:
        if leak_on_plus:
            part.ib_plus_a += leak
        else:
            part.ib_minus_a += leak
    # An open is a contact fault: the part keeps its own Iq, the fixture just cannot reach it.
    if defect == "short":
        part.short_ohm = short_ohm
    elif defect == "outlier":
        part.vos_low_v = outlier_mag
    elif defect == "crossover":
        part.cm_step_v = bad_step
    return part


def make_population(seed: int, count: int, defects: bool = True, pat_share: float = 0.0) -> list[PartTruth]:
    """The lot; `pat_share` of its otherwise normal parts become in-spec offset outliers,
    each decided by its own seeded draw (so part k stays the same whatever the lot size)."""
    parts = [make_part(seed, i, defects) for i in range(count)]
    if pat_share > 0:
        for part in parts:
            rng = np.random.default_rng([seed, part.index, 4])
            if part.defect == "none" and rng.random() < pat_share:
                part.defect = "pat_outlier"
                part.vos_low_v = float(rng.uniform(*PAT_OUTLIER_VOS_V)) * (1 if rng.random() < 0.5 else -1)
    return parts

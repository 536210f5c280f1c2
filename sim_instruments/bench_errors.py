"""Measurement errors of the simulated bench itself, for a repeatability study to find.

Off by default (the bench is then exact but for noise). When asked for, each station draws,
from its own seed, per site:

- an offset of the fixture (thermocouple junctions, relay contacts), input-referred volts;
- a gain error of the DMM that reads the site (one per DMM; a scanner bench's single DMM
  gives every site the same one): a reading is `(1 + gain_error) x node`;
- a leakage resistance from the DUT inputs to the moving common mode: the current
  VCM / R_leak through the loop's Rs || Rf adds an input-referred slope `(Rs || Rf) / R_leak`
  (V/V) that the station reads as part of the part's CMRR.

All values are invented for the demo. `as_dict()` is what a dry run records in lot.json
(`dry_run.bench_errors`), so tests can compare a study with the bench's own truth.
"""

from __future__ import annotations

from dataclasses import dataclass

import numpy as np


@dataclass(frozen=True)
class BenchErrorSpec:
    """How large the bench's errors are drawn (standard deviations), and their seed."""

    seed: int = 1
    site_offset_sigma_v: float = 2e-6       # input-referred
    dmm_gain_sigma: float = 2e-3            # relative
    leakage_min_ohm: float = 1e9            # R_leak drawn log-uniform between these
    leakage_max_ohm: float = 1e10


@dataclass(frozen=True)
class BenchErrors:
    """The drawn errors: index 0 is site 1 (or DMM 1)."""

    site_offset_v: tuple[float, ...]
    dmm_gain_error: tuple[float, ...]
    leakage_ohm: tuple[float, ...]

    def leakage_slope(self, site: int, rf_ohm: float, rs_ohm: float) -> float:
        """Input-referred dVos/dVCM the leakage of `site` (1-based) adds."""
        r_parallel = rf_ohm * rs_ohm / (rf_ohm + rs_ohm)
        return r_parallel / self.leakage_ohm[site - 1]

    def as_dict(self, rf_ohm: float, rs_ohm: float) -> dict[str, list[float]]:
        sites = range(1, len(self.site_offset_v) + 1)
        return {
            "site_offset_v": list(self.site_offset_v),
            "dmm_gain_error": list(self.dmm_gain_error),
            "leakage_ohm": list(self.leakage_ohm),
            "leakage_slope_vv": [self.leakage_slope(k, rf_ohm, rs_ohm) for k in sites],
        }


NO_ERRORS_SITES = 4


def no_errors(sites: int = NO_ERRORS_SITES) -> BenchErrors:
    return BenchErrors((0.0,) * sites, (0.0,) * sites, (float("inf"),) * sites)


def draw_bench_errors(spec: BenchErrorSpec, sites: int, dmms: int) -> BenchErrors:
    """The errors of one station, the same for the same seed (a generator of its own, so the
    part population and the noise are not disturbed)."""
    rng = np.random.default_rng([spec.seed, 9100])
    offsets = tuple(float(v) for v in rng.normal(0.0, spec.site_offset_sigma_v, sites))
    gains = tuple(float(v) for v in rng.normal(0.0, spec.dmm_gain_sigma, dmms))
    low, high = np.log10(spec.leakage_min_ohm), np.log10(spec.leakage_max_ohm)
    leakage = tuple(float(10.0 ** v) for v in rng.uniform(low, high, sites))
    if dmms == 1:  # one DMM behind the scanner reads every site
        gains = gains * sites
    return BenchErrors(offsets, gains, leakage)

"""Can the fixture resolve each limit? Checked by `station limits check --bench` and before
every lot (station/config/plan.py).

The bench config states the fixture's resolution (`fixture.resolution`): the RMS noise of one
DMM reading at the loop node at a given NPLC, and the fixture's own CMRR where it has one
(a difference-amplifier fixture's resistor match caps the CMRR it can see). With the loop
gain G = 1 + Rf/Rs, one reading's input-referred noise is sigma = noise x sqrt(NPLC_ref /
NPLC) / G, and sigma / sqrt(n) for the mean of n. A slope fitted by least squares to points
x_i has the noise sigma / sqrt(sum (x_i - mean x)^2) (ordinary least squares, textbook).

A rejection limit "L dB" is the slope 10^(-L/20). It is refused when that slope is below
RESOLVE_SIGMAS times the noise of its slope (the fixture could not tell a conforming part
from a failing one), or, for CMRR, when L is beyond the fixture's own CMRR. Our rule: 3 sigma
(common practice, no source).

A difference-amplifier fixture (bench config `fixture.diff_amp`) puts its resistors' mismatch
in series with the part: for gain G and tolerance t its own CMRR is at worst (1 + G) / (4 t)
(from memory, a standard application-note result; 74 dB at G = 1 and 0.01 %). A CMRR limit
of the difference amplifier beyond that (or beyond the characterisation's residual, where the
fixture's slope was measured and is subtracted) is refused, whether or not `fixture.resolution`
is given.
"""

from __future__ import annotations

import math
from collections.abc import Sequence as Seq

from station.config.bench_config import BenchConfig
from station.config.files import ConfigError, load_yaml_file
from station.config.limit_tables import LimitTable
from station.config.parameters import FULL_RANGE
from station.config.sequence import Sequence
from station.judge.measure import region_of

RESOLVE_SIGMAS = 3.0


def slope_noise(sigma: float, xs: Seq[float]) -> float:
    """Standard deviation of a least-squares slope through points xs with reading noise sigma."""
    mean = sum(xs) / len(xs)
    spread = sum((x - mean) ** 2 for x in xs)
    return math.inf if spread <= 0 else sigma / math.sqrt(spread)


def slope_resolution(bench: BenchConfig, sequence: Sequence, table: LimitTable) -> dict[tuple[str, str | None], float]:
    """(param, region) -> the smallest slope (V/V) the fixture resolves: RESOLVE_SIGMAS x the
    noise of the slope as the sequence measures it."""
    res = bench.resolution
    assert res is not None
    out: dict[tuple[str, str | None], float] = {}
    for step in sequence.tests:
        sigma = res.reading_noise_rti(bench.loop_gain, step.nplc) / math.sqrt(step.average)
        if step.kind == "cm_sweep":
            vcms = step.point_vcms(sequence.span_v)
            for region in table.regions:
                if region.kind != "slope":
                    continue
                xs = [v for v in vcms if region_of(v, table.regions, sequence.span_v) == region.name]
                if len(xs) >= 2:
                    out[("cmrr", region.name)] = RESOLVE_SIGMAS * slope_noise(sigma, xs)
            if len(vcms) >= 2:
                out[("cmrr", FULL_RANGE)] = RESOLVE_SIGMAS * slope_noise(sigma, [min(vcms), max(vcms)])
        elif step.kind == "diff_cmrr" and bench.diff_amp is not None:
            amp = bench.diff_amp
            sigma = res.reading_noise_rti(amp.noise_gain, step.nplc) / math.sqrt(step.average)
            vcms = step.point_vcms(sequence.span_v)
            for region in table.regions:
                xs = [v for v in vcms if region_of(v, table.regions, sequence.span_v) == region.name]
                if region.kind == "slope" and len(set(xs)) >= 2:
                    out[("cmrr_da", region.name)] = RESOLVE_SIGMAS * slope_noise(sigma, xs)
            if len(set(vcms)) >= 2:
                out[("cmrr_da", FULL_RANGE)] = RESOLVE_SIGMAS * slope_noise(sigma, [min(vcms), max(vcms)])
        elif step.kind == "supply_rejection" and len(step.spans_v) >= 2:
            out[("psrr", None)] = RESOLVE_SIGMAS * slope_noise(sigma, list(step.spans_v))
        elif step.kind == "gain" and len(step.levels_v) >= 2:
            out[("aol", None)] = RESOLVE_SIGMAS * slope_noise(sigma, list(step.levels_v))
    return out


# The difference amplifier's rejection figures, and the kinds that measure them.
DIFF_AMP_PARAMS = {"cmrr_da": "diff_cmrr", "cmrr_ac": "ac_cmrr"}
# Read as magnitudes, AC figures cannot have a characterised slope subtracted: the fixture's
# uncharacterised worst case is their resolution.
UNSUBTRACTED = {"cmrr_ac"}


def diff_amp_problems(bench: BenchConfig, sequence: Sequence, table: LimitTable) -> list[ConfigError]:
    """One ConfigError per CMRR limit of the difference amplifier beyond the fixture's own."""
    amp = bench.diff_amp
    kinds = {step.kind for step in sequence.tests}
    if amp is None or not kinds & set(DIFF_AMP_PARAMS.values()):
        return []
    doc = load_yaml_file(table.source)
    problems: list[ConfigError] = []
    where = f"{bench.source}:{amp.line}" if bench.source is not None else "the bench config"
    how = ("the characterisation's residual" if amp.characterised is not None
           else f"(1 + G) / (4 t) at G = {amp.gain:g}, t = {amp.tolerance * 100:g} %")
    for i, grade in enumerate(table.grades):
        for j, limit in enumerate(grade.limits):
            if DIFF_AMP_PARAMS.get(limit.param) not in kinds or limit.low is None:
                continue
            if limit.param in UNSUBTRACTED:
                floor_db, floor_how = -20.0 * math.log10(amp.worst_slope), (
                    f"(1 + G) / (4 t) at G = {amp.gain:g}, t = {amp.tolerance * 100:g} %; an AC magnitude "
                    "has no characterised term subtracted")
            else:
                floor_db, floor_how = amp.resolution_db, how
            if limit.low > floor_db:
                what = f"grade {grade.name} {limit.param}" + (f" {limit.region}" if limit.region else "")
                problems.append(doc.error(["grades", i, "limits", j, "low"],
                                          f"{what} limit {limit.low:g} dB is beyond what the difference amplifier "
                                          f"resolves ({floor_db:.1f} dB, {floor_how}; {where})",
                                          f"lower the limit to {math.floor(floor_db * 10) / 10:g} dB or "
                                          "less, or characterise the fixture, or use tighter resistors or more gain"))
    return problems


def resolution_problems(bench: BenchConfig, sequence: Sequence, table: LimitTable) -> list[ConfigError]:
    """One ConfigError (limits file:line) per limit the fixture cannot resolve; [] when the
    bench config states no resolution (nothing to check against)."""
    problems = diff_amp_problems(bench, sequence, table)
    res = bench.resolution
    if res is None:
        return problems
    floors = slope_resolution(bench, sequence, table)
    doc = load_yaml_file(table.source)
    for i, grade in enumerate(table.grades):
        for j, limit in enumerate(grade.limits):
            if limit.units != "dB" or limit.low is None:
                continue
            what = f"grade {grade.name} {limit.param}" + (f" {limit.region}" if limit.region else "")
            path: list[str | int] = ["grades", i, "limits", j, "low"]
            if limit.param == "cmrr" and res.cmrr_limit_db is not None and limit.low > res.cmrr_limit_db:
                problems.append(doc.error(path, f"{what} limit {limit.low:g} dB is beyond the fixture's own CMRR "
                                          f"({res.cmrr_limit_db:g} dB, {bench.source}:{res.line})",
                                          f"lower the limit to {res.cmrr_limit_db:g} dB or less, or use a "
                                          "better-matched fixture"))
                continue
            floor = floors.get((limit.param, limit.region))
            slope = 10.0 ** (-limit.low / 20.0)
            if floor is not None and slope < floor:
                best = -20.0 * math.log10(floor)
                problems.append(doc.error(path, f"{what} limit {limit.low:g} dB is |slope| {slope:.3g} V/V, below "
                                          f"what the fixture resolves ({RESOLVE_SIGMAS:g} sigma of the slope = "
                                          f"{floor:.3g} V/V, {best:.1f} dB)",
                                          f"limit at {math.floor(best * 10) / 10:g} dB or less, or raise the "
                                          "NPLC, the averaging or the sweep's span in the sequence"))
    return problems

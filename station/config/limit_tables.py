"""Limit tables: one YAML file per product with its common-mode regions, grades, limits and bins.

`load_limit_table` reads and checks a file and returns plain frozen records. Every problem is
one line, ``file:line: key.path: what is wrong (how to fix)``: the schema through pydantic
(unknown keys, wrong types), then the cross-checks a schema cannot say (regions that tile,
limits that fit their parameter, bin numbers that do not collide). See limits/px401.yaml.
"""

from __future__ import annotations

from dataclasses import dataclass
from pathlib import Path
from typing import TYPE_CHECKING, Annotated, Any, Literal

from pydantic import BaseModel, ConfigDict, Field, StrictBool, StrictInt, StrictStr

from station.config.files import (
    YamlDocument,
    load_yaml_file,
    parse_yaml_text,
    validate_model,
)
from station.config.parameters import FULL_RANGE, LIMITABLE, PARAMETERS
from station.config.quantities import parse_quantity
from station.config.rail_points import parse_rail_point
from station.config.regions import Region

if TYPE_CHECKING:
    from station.screen.pat_table import PatLayer

# Regions are checked for tiling at the nominal demo span, and their shared boundaries at a
# second span too, so a table that tiles only at 10 V is refused.
NOMINAL_SPAN_V = 10.0
SECOND_SPAN_V = 20.0
_TOLERANCE_V = 1e-9

CONTACT_OPEN_NAME = "Contact open"
CONTACT_SHORT_NAME = "Contact short"
TESTER_FAULT_NAME = "Tester fault"


# ---- public records -------------------------------------------------------------------------

@dataclass(frozen=True)
class Limit:
    """`low`/`high` are the acceptance limits the station judges with. A guard-banded table
    also keeps the specification limits they were moved in from (`spec_low`/`spec_high`,
    None where the acceptance limit is the spec limit) and the guard (`guard_u`, `guard_k`)."""

    param: str
    region: str | None
    low: float | None
    high: float | None
    units: str
    soft_bin: int
    bin_name: str
    spec_low: float | None = None
    spec_high: float | None = None
    guard_u: float | None = None
    guard_k: float | None = None

    @property
    def spec(self) -> tuple[float | None, float | None]:
        """The specification limits (the acceptance limits where no guard band was applied)."""
        return (self.spec_low if self.spec_low is not None else self.low,
                self.spec_high if self.spec_high is not None else self.high)


@dataclass(frozen=True)
class Grade:
    name: str
    hard_bin: int
    soft_bin: int
    limits: tuple[Limit, ...]


@dataclass(frozen=True)
class BinDef:
    number: int
    name: str
    passing: bool


@dataclass(frozen=True)
class ContactRule:
    open_below_a: float
    short_above_a: float
    open_soft_bin: int
    short_soft_bin: int
    hard_bin: int


@dataclass(frozen=True)
class LimitTable:
    product: str
    note: str
    regions: tuple[Region, ...]  # low to high
    grades: tuple[Grade, ...]  # best first
    hard_bins: dict[int, BinDef]
    soft_bins: dict[int, BinDef]
    fail_hard_bin: int
    contact: ContactRule
    tester_fault_hard_bin: int
    tester_fault_soft_bin: int
    source: str
    changes: tuple[dict[str, Any], ...] = ()   # change records, oldest first (station limits set)
    pat: PatLayer | None = None   # outlier screening layer (station/screen/pat_table.py)

    @property
    def loosest(self) -> Grade:
        """The last grade: a part failing it fails, binned by its first failing test here."""
        return self.grades[-1]

    def grade(self, name: str) -> Grade:
        for grade in self.grades:
            if grade.name == name:
                return grade
        known = ", ".join(g.name for g in self.grades)
        raise KeyError(f"no grade {name!r} in the {self.product} limit table (grades: {known})")


def load_limit_table(path: str | Path) -> LimitTable:
    """Read and check a limit table file; any problem is a ConfigError naming file and line."""
    return _build(load_yaml_file(path))


def parse_limit_table(text: str, file: str = "<text>") -> LimitTable:
    return _build(parse_yaml_text(text, file))


# ---- schema ---------------------------------------------------------------------------------

BinNumber = Annotated[StrictInt, Field(ge=0, le=32767)]  # STDF bin numbers are U*2
BinKey = Annotated[int, Field(ge=0, le=32767)]  # a quoted '1' as a mapping key is still bin 1
# Values with units are read by parse_quantity below, whose messages say how to write them.
Value = Any


class _Model(BaseModel):
    model_config = ConfigDict(extra="forbid")


class _RegionModel(_Model):
    from_: StrictStr = Field(alias="from")
    to: StrictStr
    kind: Literal["slope", "step"]


class _HardBinModel(_Model):
    name: StrictStr
    passing: StrictBool = Field(alias="pass")


class _ContactModel(_Model):
    open_below: Value
    short_above: Value
    open_soft_bin: BinNumber
    short_soft_bin: BinNumber
    hard_bin: BinNumber


class _TesterFaultModel(_Model):
    hard_bin: BinNumber
    soft_bin: BinNumber


class _GuardModel(_Model):
    rule: Literal["guarded", "simple"]
    k: float = Field(ge=0, le=10)
    u: Value                     # standard uncertainty, in the parameter's units (V/V for dB figures)
    study: StrictStr = ""


class _LimitModel(_Model):
    param: StrictStr
    region: StrictStr | None = None
    low: Value | None = None
    high: Value | None = None
    spec_low: Value | None = None     # guard-banded table: the specification limits
    spec_high: Value | None = None
    guard: _GuardModel | None = None
    soft_bin: BinNumber
    bin: StrictStr


class _ChangeModel(_Model):
    """One change record of `station limits set` / `limits guard` (what, old, new, who, when, why)."""

    what: StrictStr
    old: Any = None
    new: Any = None
    who: StrictStr
    when: StrictStr
    why: StrictStr


class _GradeModel(_Model):
    name: StrictStr
    hard_bin: BinNumber
    soft_bin: BinNumber
    bin: StrictStr | None = None  # name of the grade's pass soft bin; default "Grade <name>"
    limits: list[_LimitModel]


class _TableModel(_Model):
    product: StrictStr
    note: StrictStr = ""
    regions: dict[StrictStr, _RegionModel]
    hard_bins: dict[BinKey, _HardBinModel]
    contact: _ContactModel
    tester_fault: _TesterFaultModel
    fail_hard_bin: BinNumber
    grades: list[_GradeModel]
    changes: list[_ChangeModel] = []
    pat: Any = None  # checked by station/screen/pat_table.py


# ---- cross-checks ---------------------------------------------------------------------------

def _build(doc: YamlDocument) -> LimitTable:
    model = validate_model(doc, _TableModel)
    regions = _regions(doc, model)
    hard_bins = {n: BinDef(n, b.name, b.passing) for n, b in sorted(model.hard_bins.items())}
    _check_hard_bins(doc, model, hard_bins)
    contact = _contact(doc, model)
    grades = _grades(doc, model, regions)
    soft_bins = _soft_bins(doc, model, grades)
    from station.screen.pat_table import read_pat_layer  # the layer lives with the screens

    pat = read_pat_layer(doc, {r.name: r.kind for r in regions}, hard_bins, soft_bins)
    if pat is not None:
        soft_bins = dict(sorted({**soft_bins, **pat.soft_bins}.items()))
    return LimitTable(
        product=model.product, note=model.note, regions=regions, grades=grades,
        hard_bins=hard_bins, soft_bins=soft_bins, fail_hard_bin=model.fail_hard_bin,
        contact=contact, tester_fault_hard_bin=model.tester_fault.hard_bin,
        tester_fault_soft_bin=model.tester_fault.soft_bin, source=doc.file,
        changes=tuple(c.model_dump() for c in model.changes), pat=pat)


def _regions(doc: YamlDocument, model: _TableModel) -> tuple[Region, ...]:
    regions: list[Region] = []
    for name, entry in model.regions.items():
        if name == FULL_RANGE:
            raise doc.error(["regions", name], f"'{FULL_RANGE}' is reserved for the full-range figure",
                            "give the region another name")
        ends = []
        for key, text in (("from", entry.from_), ("to", entry.to)):
            try:
                ends.append(parse_rail_point(text))
            except ValueError as exc:
                raise doc.error(["regions", name, key], str(exc)) from None
        lower, upper = ends
        lo, hi = lower.vcm(NOMINAL_SPAN_V), upper.vcm(NOMINAL_SPAN_V)
        if not hi > lo + _TOLERANCE_V:
            raise doc.error(["regions", name],
                            f"region ends at '{upper}' ({hi:g} V), not above its start '{lower}' "
                            f"({lo:g} V) at a {NOMINAL_SPAN_V:g} V span", "swap 'from' and 'to'")
        regions.append(Region(name, entry.kind, lower, upper))
    for below, above in zip(regions, regions[1:], strict=False):
        _check_adjacent(doc, below, above)
    return tuple(regions)


def _check_adjacent(doc: YamlDocument, below: Region, above: Region) -> None:
    """Consecutive regions must meet exactly: no overlap, no gap, listed low to high."""
    span = NOMINAL_SPAN_V
    end, start = below.upper.vcm(span), above.lower.vcm(span)
    where = ["regions", above.name, "from"]
    if above.lower.vcm(span) < below.lower.vcm(span) - _TOLERANCE_V:
        raise doc.error(["regions", above.name],
                        f"region {above.name!r} starts below {below.name!r} listed before it",
                        "list the regions from low to high common-mode")
    if start < end - _TOLERANCE_V:
        raise doc.error(where, f"region {above.name!r} starts at '{above.lower}', which overlaps "
                        f"{below.name!r} (ends at '{below.upper}'; {start:g} V < {end:g} V at a "
                        f"{span:g} V span)", f"make {above.name!r} start where {below.name!r} ends")
    if start > end + _TOLERANCE_V:
        raise doc.error(where, f"gap between region {below.name!r} (ends at '{below.upper}') and "
                        f"{above.name!r} (starts at '{above.lower}'; {end:g} V to {start:g} V at a "
                        f"{span:g} V span)", f"make {above.name!r} start where {below.name!r} ends")
    if abs(below.upper.vcm(SECOND_SPAN_V) - above.lower.vcm(SECOND_SPAN_V)) > _TOLERANCE_V:
        raise doc.error(where, f"region {below.name!r} ends at '{below.upper}' and {above.name!r} "
                        f"starts at '{above.lower}': these meet at a {span:g} V span only",
                        "write the shared boundary against the same rail so the regions tile at any span")


def _check_hard_bins(doc: YamlDocument, model: _TableModel, hard_bins: dict[int, BinDef]) -> None:
    def need(path: list[str | int], number: int, passing: bool, what: str) -> None:
        if number not in hard_bins:
            defined = ", ".join(str(n) for n in sorted(hard_bins)) or "none"
            raise doc.error(path, f"hard bin {number} is not defined (defined: {defined})",
                            f"add it under hard_bins with a name and pass: {str(passing).lower()}")
        if hard_bins[number].passing != passing:
            state = "not marked pass" if passing else "marked pass"
            raise doc.error(path, f"{what} goes to hard bin {number} "
                            f"({hard_bins[number].name!r}), which is {state}",
                            f"set pass: {str(passing).lower()} on hard bin {number} or use another bin")

    for i, grade in enumerate(model.grades):
        need(["grades", i, "hard_bin"], grade.hard_bin, True, f"grade {grade.name!r}")
    need(["fail_hard_bin"], model.fail_hard_bin, False, "a parametric fail")
    need(["contact", "hard_bin"], model.contact.hard_bin, False, "a contact fail")
    need(["tester_fault", "hard_bin"], model.tester_fault.hard_bin, False, "a tester fault")
    if model.tester_fault.hard_bin in (model.fail_hard_bin, model.contact.hard_bin):
        raise doc.error(["tester_fault", "hard_bin"],
                        f"hard bin {model.tester_fault.hard_bin} also takes DUT failures",
                        "tester faults are never a DUT fail: give them a retest hard bin of their own")


# No figure the bench measures comes near these: a limit beyond is a slip of the unit
# ("1e30 uV"), refused rather than silently passing every part.
_SANE_LIMIT: dict[str, float] = {"V": 30.0, "A": 1.0, "dB": 400.0, "V/V": 1e12}


def _refuse_absurd(doc: YamlDocument, path: list, what: str, raw: object, value: float, unit: str) -> None:
    bound = _SANE_LIMIT.get(unit)
    if bound is not None and abs(value) > bound:
        raise doc.error(path, f"{what} {raw!r} is beyond any value the bench can measure "
                        f"(|value| <= {bound:g} {unit})", "check the unit prefix")


def _contact(doc: YamlDocument, model: _TableModel) -> ContactRule:
    c = model.contact
    values = {}
    for key in ("open_below", "short_above"):
        try:
            values[key] = parse_quantity(getattr(c, key), "A")
        except ValueError as exc:
            raise doc.error(["contact", key], str(exc)) from None
        if values[key] < 0:
            raise doc.error(["contact", key], "a supply-current threshold cannot be negative")
        _refuse_absurd(doc, ["contact", key], "contact threshold", getattr(c, key), values[key], "A")
    if not values["open_below"] < values["short_above"]:
        raise doc.error(["contact"], f"open_below ({_show(values['open_below'], 'A')}) must be "
                        f"below short_above ({_show(values['short_above'], 'A')})",
                        "swap or correct them")
    return ContactRule(values["open_below"], values["short_above"], c.open_soft_bin,
                       c.short_soft_bin, c.hard_bin)


def _grades(doc: YamlDocument, model: _TableModel,
            regions: tuple[Region, ...]) -> tuple[Grade, ...]:
    if not model.grades:
        raise doc.error(["grades"], "no grades", "list at least one grade, best first")
    kinds: dict[str, str] = {r.name: r.kind for r in regions}
    grades: list[Grade] = []
    seen_names: dict[str, int] = {}
    for i, g in enumerate(model.grades):
        if g.name in seen_names:
            raise doc.error(["grades", i, "name"], f"grade {g.name!r} is listed twice "
                            f"(also grades[{seen_names[g.name]}])", "give each grade its own name")
        seen_names[g.name] = i
        if not g.limits:
            raise doc.error(["grades", i, "limits"], f"grade {g.name!r} has no limits",
                            "a grade without limits would pass every part: add its limits")
        limits: list[Limit] = []
        seen: dict[tuple[str, str | None], int] = {}
        for j, entry in enumerate(g.limits):
            path: list[str | int] = ["grades", i, "limits", j]
            limit = _limit(doc, path, entry, kinds)
            key = (limit.param, limit.region)
            if key in seen:
                what = limit.param + (f" in region {limit.region!r}" if limit.region else "")
                raise doc.error(path, f"grade {g.name!r} limits {what} twice "
                                f"(also limits[{seen[key]}])", "merge them into one entry")
            seen[key] = j
            limits.append(limit)
        grades.append(Grade(g.name, g.hard_bin, g.soft_bin, tuple(limits)))
    return tuple(grades)


def _limit(doc: YamlDocument, path: list[str | int], entry: _LimitModel,
           kinds: dict[str, str]) -> Limit:
    param = entry.param
    if param not in LIMITABLE:
        known = ", ".join(sorted(LIMITABLE))
        why = "is logged but cannot be limited" if param in PARAMETERS else "is not a known parameter"
        raise doc.error([*path, "param"], f"{param!r} {why}", f"limitable parameters: {known}")
    info = PARAMETERS[param]
    _check_region(doc, path, param, info.region_kind, entry.region, kinds)
    bounds: dict[str, float | None] = {"low": None, "high": None, "spec_low": None, "spec_high": None}
    for key in bounds:
        raw = getattr(entry, key, None)   # a PAT layer's limits have no spec_* (station/screen)
        if raw is None:
            continue
        try:
            value = parse_quantity(raw, info.units)
        except ValueError as exc:
            raise doc.error([*path, key], f"{param} limit: {exc}") from None
        _refuse_absurd(doc, [*path, key], f"{param} limit", raw, value, info.units)
        bounds[key] = value
    low, high = bounds["low"], bounds["high"]
    if low is None and high is None:
        raise doc.error(path, f"{param} limit has neither low nor high", "add low:, high: or both")
    if low is not None and high is not None and low > high:
        raise doc.error([*path, "low"], f"{param} low limit {_show(low, info.units)} is above "
                        f"the high limit {_show(high, info.units)}", "swap low and high")
    spec_low, spec_high = bounds["spec_low"], bounds["spec_high"]
    for key, spec, acceptance in (("spec_low", spec_low, low), ("spec_high", spec_high, high)):
        if spec is None:
            continue
        if acceptance is None:
            raise doc.error([*path, key], f"{param} has {key} but no {key[5:]} acceptance limit",
                            f"add {key[5:]}: (the acceptance limit) or remove {key}:")
        looser = acceptance < spec if key == "spec_low" else acceptance > spec
        if looser:
            raise doc.error([*path, key[5:]], f"{param} acceptance limit {_show(acceptance, info.units)} lies "
                            f"outside its specification limit {_show(spec, info.units)}",
                            "a guard band moves the acceptance limit inside the spec limit")
    guard_u = None
    guard = getattr(entry, "guard", None)
    if guard is not None:
        units = "V/V" if info.units == "dB" else info.units
        try:
            guard_u = parse_quantity(guard.u, units)
        except ValueError as exc:
            raise doc.error([*path, "guard", "u"], f"guard uncertainty: {exc}") from None
        if guard_u < 0:
            raise doc.error([*path, "guard", "u"], "a standard uncertainty cannot be negative")
    return Limit(param, entry.region, low, high, info.units, entry.soft_bin, entry.bin, spec_low, spec_high,
                 guard_u, guard.k if guard else None)


def _check_region(doc: YamlDocument, path: list[str | int], param: str, kind: str | None,
                  region: str | None, kinds: dict[str, str]) -> None:
    if kind is None:
        if region is not None:
            raise doc.error([*path, "region"], f"{param} takes no region", "remove region:")
        return
    if kind == "application":  # an application's name: the plan checks it against the sequence's
        if region is None:
            raise doc.error(path, f"{param} needs a region", "add region: the application's name")
        return
    if kind == "frequency":    # a frequency point: the plan checks it against the sequence's
        if region is None:
            raise doc.error(path, f"{param} needs a region", "add region: a frequency point, e.g. 1 kHz")
        return
    allowed = [name for name, k in kinds.items() if k == kind]
    if kind == "slope":
        allowed.append(FULL_RANGE)
    choices = ", ".join(allowed) or "none defined"
    if region is None:
        raise doc.error(path, f"{param} needs a region", f"add region: one of {choices}")
    if region not in allowed:
        if region in kinds:
            problem = f"region {region!r} is a {kinds[region]} region; {param} takes {kind} regions"
        else:
            problem = f"unknown region {region!r}"
        raise doc.error([*path, "region"], problem, f"{param} takes region: {choices}")


def _soft_bins(doc: YamlDocument, model: _TableModel,
               grades: tuple[Grade, ...]) -> dict[int, BinDef]:
    """Soft bins from the grades (pass), contact, tester fault and every limit (fail)."""
    bins: dict[int, BinDef] = {}
    origin: dict[int, tuple[str, bool]] = {}  # number -> (where it was defined, shareable)

    def add(path: list[str | int], number: int, name: str, passing: bool, shareable: bool) -> None:
        where = f"line {doc.line_of(path)}"
        if number in bins:
            first = bins[number]
            first_where, first_shareable = origin[number]
            if not (shareable and first_shareable):
                raise doc.error(path, f"soft bin {number} ({name!r}) is already taken by "
                                f"{first.name!r} ({first_where})",
                                "pass bins, contact and tester-fault bins need numbers of their own")
            if first.name != name:
                raise doc.error(path, f"soft bin {number} has two names: {first.name!r} "
                                f"({first_where}) and {name!r}",
                                "use one name per soft bin number, or another number")
            return
        bins[number] = BinDef(number, name, passing)
        origin[number] = (where, shareable)

    for i, (g_model, grade) in enumerate(zip(model.grades, grades, strict=True)):
        add(["grades", i, "soft_bin"], grade.soft_bin, g_model.bin or f"Grade {grade.name}",
            True, False)
    add(["contact", "open_soft_bin"], model.contact.open_soft_bin, CONTACT_OPEN_NAME, False, False)
    add(["contact", "short_soft_bin"], model.contact.short_soft_bin, CONTACT_SHORT_NAME, False, False)
    add(["tester_fault", "soft_bin"], model.tester_fault.soft_bin, TESTER_FAULT_NAME, False, False)
    for i, grade in enumerate(grades):
        for j, limit in enumerate(grade.limits):
            # The same failure bin may recur across grades (Offset in A and in B).
            add(["grades", i, "limits", j, "soft_bin"], limit.soft_bin, limit.bin_name, False, True)
    return dict(sorted(bins.items()))


def _show(value: float, units: str) -> str:
    """A limit as an engineer writes it: 160 uV, not 0.00016 V (dB as is)."""
    if units not in ("V", "A") or value == 0:
        return f"{value:g} {units}"
    scale, prefix = next(((s, p) for s, p in ((1.0, ""), (1e-3, "m"), (1e-6, "u"))
                          if abs(value) >= s), (1e-9, "n"))
    return f"{value / scale:.6g} {prefix}{units}"


__all__ = [
    "BinDef", "ContactRule", "Grade", "Limit", "LimitTable", "Region",
    "load_limit_table", "parse_limit_table", "NOMINAL_SPAN_V",
]

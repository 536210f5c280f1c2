"""The screening sequence: what to measure, in which order, under which conditions.

A sequence file (YAML) lists the tests; `load_sequence` validates it into plain frozen
records with SI floats. `check_bench_safety` refuses a sequence that would drive a rail or a
current beyond the bench's safety limits (each test kind names the rails it programs and
checks its own conditions, station/kinds); it runs before anything is powered.
"""

from __future__ import annotations

import math
from dataclasses import dataclass, replace
from pathlib import Path
from typing import Any

from drivers.dmm import RANGES_V as DMM_RANGES_V
from drivers.force import INSTRUMENT_MAX_V as FORCE_MAX_V
from drivers.supply import INSTRUMENT_MAX_A as SUPPLY_MAX_A
from drivers.supply import INSTRUMENT_MAX_V as SUPPLY_MAX_V
from drivers.supply import INSTRUMENT_MIN_A as SUPPLY_MIN_A
from station.config.files import ConfigError, YamlDocument, load_yaml_file, parse_yaml_text
from station.config.quantities import format_quantity, parse_quantity
from station.config.rail_points import RailPoint, parse_rail_point, rails_for
from station.kinds.registry import KINDS, kind_of

TEST_KINDS = tuple(KINDS)


@dataclass(frozen=True)
class Settle:
    """How long to wait after a source change before a reading counts.

    One of three policies:
    - fixed: wait `wait_s`, then read once;
    - adaptive, absolute: read until two successive readings agree within `stable_rti_v`
      (referred to the input) on every site;
    - adaptive, noise-derived (`stable_within: auto`): read until the residual predicted from
      an exponential approach with time constant `tail_s` is below `sigmas` times the noise
      of the reading, the noise being measured by the station itself.
    Adaptive settling waits at least `min_s` and at most `max_s`.
    """

    wait_s: float | None = None
    stable_rti_v: float | None = None
    min_s: float = 0.0
    max_s: float = 0.5
    sigmas: float | None = None     # set for `stable_within: auto`
    tail_s: float = 0.04            # slowest time constant of the approach (auto only)

    @property
    def adaptive(self) -> bool:
        return self.stable_rti_v is not None or self.sigmas is not None

    @property
    def auto(self) -> bool:
        return self.sigmas is not None


@dataclass(frozen=True)
class TestStep:
    __test__ = False  # not a pytest test class, despite the name

    index: int                      # 1-based position in the sequence; fixes its test numbers
    kind: str
    name: str
    nplc: float
    average: int
    settle: Settle
    stop_on_fail: bool
    retest: int = 0                 # contact: re-seat and retest this many times
    points: tuple[RailPoint, ...] = ()   # cm_sweep, in the order written
    levels_v: tuple[float, ...] = ()     # gain: commanded output levels
    spans_v: tuple[float, ...] = ()      # supply_rejection: supply spans
    applications: str | None = None      # budget: application file, relative to the sequence file
    line: int | None = None              # line of the entry in the sequence file, for errors

    def point_vcms(self, span_v: float) -> tuple[float, ...]:
        return tuple(p.vcm(span_v) for p in self.points)


@dataclass(frozen=True)
class Sequence:
    name: str
    product: str
    span_v: float
    compliance_a: float
    dmm_range_v: float
    autozero: bool
    tests: tuple[TestStep, ...]
    source: str

    def steps(self, kind: str) -> tuple[TestStep, ...]:
        return tuple(t for t in self.tests if t.kind == kind)


_TOP_KEYS = {"sequence", "product", "note", "supply", "dmm", "settle", "stop_on_fail", "tests"}
_TEST_KEYS = {
    "common": {"kind", "name", "nplc", "average", "settle", "stop_on_fail"},
    "contact": {"retest"},
    "offset": set(),
    "cm_sweep": {"points", "range"},
    "gain": {"levels"},
    "supply_rejection": {"spans"},
    "supply_current": set(),
    "bias_current": set(),
    "budget": {"applications"},
}
_DEFAULT_NAMES = {name: kind.title for name, kind in KINDS.items()}


def load_sequence(path: str | Path) -> Sequence:
    return _build(load_yaml_file(path))


def parse_sequence(text: str, file: str = "<text>") -> Sequence:
    return _build(parse_yaml_text(text, file))


class _Reader:
    """Reads typed values out of a YAML document, turning every problem into a ConfigError."""

    def __init__(self, doc: YamlDocument) -> None:
        self.doc = doc

    def mapping(self, value: Any, path: list, allowed: set[str]) -> dict:
        if not isinstance(value, dict):
            raise self.doc.error(path, "expected a mapping of keys", "indent the keys below it")
        for key in value:
            if key not in allowed:
                raise self.doc.error([*path, key], "unknown key",
                                     f"allowed here: {', '.join(sorted(allowed))}")
        return value

    def quantity(self, value: Any, path: list, unit: str,
                 within: tuple[float, float, str] | None = None,
                 above_zero: bool = False) -> float:
        """A finite quantity inside `within` (low, high, why), or else the sane range of its unit."""
        try:
            number = parse_quantity(value, unit)
        except ValueError as exc:
            raise self.doc.error(path, str(exc)) from None
        # The sign is the likelier mistake, so it is named before the range.
        if above_zero and number <= 0:
            raise self.doc.error(path, f"must be above zero, got {value!r}")
        low, high, why = within or _SANE.get(unit, (-math.inf, math.inf, ""))
        if not low <= number <= high:
            raise self.doc.error(path, f"{value!r} is outside {_show(low, unit)} to {_show(high, unit)}"
                                 f" ({why})", f"write a value from {_show(low, unit)} to {_show(high, unit)}")
        return number

    def positive(self, value: Any, path: list, unit: str,
                 within: tuple[float, float, str] | None = None) -> float:
        return self.quantity(value, path, unit, within, above_zero=True)

    def integer(self, value: Any, path: list, low: int, high: int) -> int:
        if isinstance(value, bool) or not isinstance(value, int) or not low <= value <= high:
            raise self.doc.error(path, f"expected a whole number from {low} to {high}, got {value!r}")
        return value

    def boolean(self, value: Any, path: list) -> bool:
        if not isinstance(value, bool):
            raise self.doc.error(path, f"expected true or false, got {value!r}")
        return value

    def text(self, value: Any, path: list) -> str:
        if not isinstance(value, str) or not value.strip():
            raise self.doc.error(path, f"expected a non-empty name, got {value!r}")
        return value.strip()

    def settle(self, value: Any, path: list, default: Settle) -> Settle:
        if value is None:
            return default
        spec = self.mapping(value, path, {"wait", "stable_within", "min", "max", "sigmas", "tail"})
        if ("wait" in spec) == ("stable_within" in spec):
            raise self.doc.error(path, "give either 'wait' (fixed settling) or 'stable_within' "
                                       "(adaptive settling), not both or neither",
                                 "e.g. settle: {wait: 50 ms} or settle: {stable_within: auto, max: 300 ms}")
        auto = spec.get("stable_within") == "auto"
        for key in ("sigmas", "tail"):
            if key in spec and not auto:
                raise self.doc.error([*path, key], f"'{key}' applies only to 'stable_within: auto'",
                                     "remove it, or write stable_within: auto")
        min_s = self.quantity(spec.get("min", 0.0), [*path, "min"], "s")
        max_s = self.positive(spec.get("max", default.max_s), [*path, "max"], "s")
        if min_s < 0 or min_s > max_s:
            raise self.doc.error([*path, "min"], "must be from 0 up to 'max'")
        if "wait" in spec:
            wait = self.quantity(spec["wait"], [*path, "wait"], "s")
            if wait < 0:
                raise self.doc.error([*path, "wait"], "a settling wait cannot be negative")
            return Settle(wait_s=wait, min_s=min_s, max_s=max(max_s, wait))
        if auto:
            sigmas = self.positive(spec.get("sigmas", 2.0), [*path, "sigmas"], "V/V")  # a plain number
            tail = self.positive(spec.get("tail", "40 ms"), [*path, "tail"], "s")
            return Settle(sigmas=sigmas, tail_s=tail, min_s=min_s, max_s=max_s)
        return Settle(stable_rti_v=self.positive(spec["stable_within"], [*path, "stable_within"], "V"),
                      min_s=min_s, max_s=max_s)

    def rail_point(self, value: Any, path: list) -> RailPoint:
        try:
            return parse_rail_point(value)
        except ValueError as exc:
            raise self.doc.error(path, str(exc)) from None

    def volt_list(self, value: Any, path: list, what: str,
                  within: tuple[float, float, str] | None = None) -> tuple[float, ...]:
        if not isinstance(value, list) or len(value) < 2:
            raise self.doc.error(path, f"expected a list of at least two {what}", "e.g. [-4 V, 4 V]")
        numbers = tuple(self.quantity(item, [*path, i], "V", within) for i, item in enumerate(value))
        if len(set(numbers)) < 2:
            raise self.doc.error(path, f"the {what} must differ, or no slope can be measured")
        return numbers


# Sane ranges (the instruments' own limits, from the drivers): a value outside is a typo or a
# unit slip, refused at load before anything is powered.
_SPAN = (0.0, 2 * SUPPLY_MAX_V, f"two rails of at most {SUPPLY_MAX_V:g} V each")
_FORCE = (-FORCE_MAX_V, FORCE_MAX_V, f"the force source spans +-{FORCE_MAX_V:g} V")
_SANE: dict[str, tuple[float, float, str]] = {
    "s": (0.0, 60.0, "a settling or integration time over a minute is a slip of the unit"),
    "V": (-2 * SUPPLY_MAX_V, 2 * SUPPLY_MAX_V, "beyond what the rail supply can span"),
    "A": (-SUPPLY_MAX_A, SUPPLY_MAX_A, "beyond the rail supply's current range"),
}


def _show(value: float, unit: str) -> str:
    return format_quantity(value, unit) if math.isfinite(value) else f"{value:g} {unit}"


def _build(doc: YamlDocument) -> Sequence:
    read = _Reader(doc)
    top = read.mapping(doc.data, [], _TOP_KEYS)
    for key in ("sequence", "product", "supply", "tests"):
        if key not in top:
            raise doc.error([], f"required key '{key}' is missing", "see sequences/px401_screen.yaml")
    supply = read.mapping(top["supply"], ["supply"], {"span", "compliance"})
    if "span" not in supply:
        raise doc.error(["supply"], "required key 'span' is missing", "e.g. span: 10 V")
    span = read.positive(supply["span"], ["supply", "span"], "V", _SPAN)
    compliance = read.positive(supply.get("compliance", "20 mA"), ["supply", "compliance"], "A",
                               (SUPPLY_MIN_A, SUPPLY_MAX_A, "the rail supply's compliance range"))
    dmm = read.mapping(top.get("dmm", {}), ["dmm"], {"nplc", "range", "autozero"})
    nplc = _nplc(read, dmm.get("nplc", 1), ["dmm", "nplc"])
    dmm_range = read.positive(dmm.get("range", "10 V"), ["dmm", "range"], "V")
    if dmm_range not in DMM_RANGES_V:
        raise doc.error(["dmm", "range"], f"{dmm.get('range')!r} is not a range of the DMM",
                        "ranges: " + ", ".join(f"{r:g} V" for r in DMM_RANGES_V))
    autozero = read.boolean(dmm.get("autozero", False), ["dmm", "autozero"])
    settle = read.settle(top.get("settle"), ["settle"], Settle(wait_s=0.05))
    stop_default = read.boolean(top.get("stop_on_fail", False), ["stop_on_fail"])

    tests_raw = top["tests"]
    if not isinstance(tests_raw, list) or not tests_raw:
        raise doc.error(["tests"], "expected a non-empty list of tests",
                        f"each with a 'kind' out of: {', '.join(TEST_KINDS)}")
    steps = []
    for i, raw in enumerate(tests_raw):
        path: list[str | int] = ["tests", i]
        if not isinstance(raw, dict) or "kind" not in raw:
            raise doc.error(path, "each test needs a 'kind'", f"one of: {', '.join(TEST_KINDS)}")
        kind = raw["kind"]
        if kind not in TEST_KINDS:
            raise doc.error([*path, "kind"], f"unknown test kind {kind!r}", f"one of: {', '.join(TEST_KINDS)}")
        spec = read.mapping(raw, path, _TEST_KEYS["common"] | _TEST_KEYS[kind])
        steps.append(_step(read, spec, path, i + 1, kind, nplc, settle, stop_default, span))
    kinds = [s.kind for s in steps]
    for kind in kinds:
        if kinds.count(kind) > 1:
            raise doc.error(["tests"], f"test kind {kind!r} appears more than once",
                            "combine the entries: each figure is measured once per part")
    if "contact" in kinds and kinds[0] != "contact":
        raise doc.error(["tests", kinds.index("contact")], "the contact check must come first",
                        "it finds opens and shorts before the part is measured")
    return Sequence(name=read.text(top["sequence"], ["sequence"]), product=read.text(top["product"], ["product"]),
                    span_v=span, compliance_a=compliance, dmm_range_v=dmm_range, autozero=autozero,
                    tests=tuple(steps), source=doc.file)


def _nplc(read: _Reader, value: Any, path: list) -> float:
    number = read.quantity(value, path, "V/V")  # plain number; "V/V" only so a bare float passes
    if not 0.02 <= number <= 100:
        raise read.doc.error(path, f"NPLC must be from 0.02 to 100, got {value!r}")
    return number


def _step(read: _Reader, spec: dict, path: list, index: int, kind: str, nplc: float, settle: Settle,
          stop_default: bool, span: float) -> TestStep:
    common = TestStep(
        index=index, kind=kind, line=read.doc.line_of(path),
        name=read.text(spec.get("name", _DEFAULT_NAMES[kind]), [*path, "name"]),
        nplc=_nplc(read, spec["nplc"], [*path, "nplc"]) if "nplc" in spec else nplc,
        average=read.integer(spec.get("average", 1), [*path, "average"], 1, 1000),
        settle=read.settle(spec.get("settle"), [*path, "settle"], settle),
        stop_on_fail=read.boolean(spec.get("stop_on_fail", stop_default), [*path, "stop_on_fail"]),
    )
    if kind == "contact":
        return replace(common, retest=read.integer(spec.get("retest", 1), [*path, "retest"], 0, 3))
    if kind == "cm_sweep":
        return replace(common, points=_sweep_points(read, spec, path, span))
    if kind == "gain":
        if "levels" not in spec:
            raise read.doc.error(path, "a gain test needs 'levels'", "e.g. levels: [-4 V, 4 V]")
        return replace(common, levels_v=read.volt_list(spec["levels"], [*path, "levels"], "output levels", _FORCE))
    if kind == "supply_rejection":
        if "spans" not in spec:
            raise read.doc.error(path, "a supply_rejection test needs 'spans'", "e.g. spans: [8 V, 12 V]")
        spans = read.volt_list(spec["spans"], [*path, "spans"], "supply spans", _SPAN)
        for j, value in enumerate(spans):
            if value <= 0:
                raise read.doc.error([*path, "spans", j], "a supply span must be above zero")
        return replace(common, spans_v=spans)
    if kind == "budget":
        if "applications" not in spec:
            raise read.doc.error(path, "a budget test needs 'applications'",
                                 "e.g. applications: ../applications/px401_apps.yaml")
        return replace(common, applications=read.text(spec["applications"], [*path, "applications"]))
    return common


def _sweep_points(read: _Reader, spec: dict, path: list, span: float) -> tuple[RailPoint, ...]:
    if ("points" in spec) == ("range" in spec):
        raise read.doc.error(path, "a cm_sweep needs either 'points' or 'range', not both",
                             "e.g. points: ['V- - 0.1 V', 'mid', 'V+ + 0.1 V']")
    if "points" in spec:
        raw = spec["points"]
        if not isinstance(raw, list) or len(raw) < 2:
            raise read.doc.error([*path, "points"], "expected a list of at least two common-mode points")
        points = tuple(read.rail_point(item, [*path, "points", i]) for i, item in enumerate(raw))
    else:
        rng = read.mapping(spec["range"], [*path, "range"], {"from", "to", "count"})
        for key in ("from", "to", "count"):
            if key not in rng:
                raise read.doc.error([*path, "range"], f"required key '{key}' is missing",
                                     "e.g. range: {from: 'V- - 0.1 V', to: 'V+ + 0.1 V', count: 21}")
        start = read.rail_point(rng["from"], [*path, "range", "from"])
        stop = read.rail_point(rng["to"], [*path, "range", "to"])
        count = read.integer(rng["count"], [*path, "range", "count"], 2, 1000)
        lo, hi = start.vcm(span), stop.vcm(span)
        # Points between two rail-relative ends are written relative to the mid-point.
        points = tuple(RailPoint("mid", round(lo + (hi - lo) * k / (count - 1), 9)) for k in range(count))
    vcms = [p.vcm(span) for p in points]
    if len(set(vcms)) != len(vcms):
        raise read.doc.error([*path, "points" if "points" in spec else "range"],
                             "two common-mode points are the same voltage", "remove the duplicate")
    return points


def sweep_rails(sequence: Sequence) -> list[tuple[str, float, float]]:
    """Every (what, V+, V-) the sequence will program, for the safety check."""
    rails = [("nominal supply", *rails_for(0.0, sequence.span_v))]
    for step in sequence.tests:
        rails.extend(kind_of(step).rails(step, sequence.span_v))
    return rails


def check_bench_safety(sequence: Sequence, max_rail_v: float, compliance_a: float) -> None:
    """Refuse, before anything is powered, a sequence beyond the bench's safety limits."""
    where = sequence.source
    for what, v_pos, v_neg in sweep_rails(sequence):
        worst = max(abs(v_pos), abs(v_neg))
        if worst > max_rail_v + 1e-9:
            raise ConfigError(where, f"{what} needs rails V+ = {v_pos:+.3f} V, V- = {v_neg:+.3f} V, "
                                     f"beyond the bench's safety limit of {max_rail_v:g} V",
                              hint="lower the span or the sweep, or raise safety.max_rail in the bench "
                                   "config if the fixture and part allow it")
    if sequence.compliance_a > compliance_a + 1e-12:
        raise ConfigError(where, f"supply.compliance {sequence.compliance_a * 1e3:g} mA is above the "
                                 f"bench's safety compliance of {compliance_a * 1e3:g} mA",
                          hint="lower supply.compliance in the sequence")
    for step in sequence.tests:
        kind_of(step).check_safety(step, sequence)

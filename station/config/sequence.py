"""The screening sequence: what to measure, in which order, under which conditions.

A sequence file (YAML) lists the tests; `load_sequence` validates it (pydantic: the top level
here, each test entry by its kind's spec, station/config/step_spec.py) into plain frozen
records with SI floats. `check_bench_safety` refuses a sequence that would drive a rail or a
current beyond the bench's safety limits (each test kind names the rails it programs and
checks its own conditions, station/kinds); it runs before anything is powered.
"""

from __future__ import annotations

from dataclasses import dataclass
from pathlib import Path
from typing import TYPE_CHECKING, Annotated, Any

from pydantic import AfterValidator

from drivers.dmm import RANGES_V as DMM_RANGES_V
from drivers.supply import INSTRUMENT_MAX_A as SUPPLY_MAX_A
from drivers.supply import INSTRUMENT_MIN_A as SUPPLY_MIN_A
from station.config.approach import Approach
from station.config.fields import Flag, Strict, Text, quantity, refuse
from station.config.files import (
    ConfigError,
    YamlDocument,
    load_yaml_file,
    parse_yaml_text,
    validate_model,
)
from station.config.quantities import format_quantity
from station.config.rail_points import RailPoint, rails_for
from station.config.step_spec import Nplc, SettleSpec, Span
from station.kinds.registry import KINDS, kind_of
from station.screen.lot_rules import Rule, read_lot_control

if TYPE_CHECKING:
    from station.kinds.ac_cmrr import AcSweep

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
    predict: Approach | None = None      # bias_current: predicted settling after each relay change
    ac: AcSweep | None = None            # ac_cmrr: frequency points and the sine on the tied inputs
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
    lot_control: tuple[Rule, ...] = ()   # station/screen/lot_rules.py

    def steps(self, kind: str) -> tuple[TestStep, ...]:
        return tuple(t for t in self.tests if t.kind == kind)


class SupplySpec(Strict):
    span: Span
    compliance: Annotated[float, quantity("A", ge=SUPPLY_MIN_A, le=SUPPLY_MAX_A,
                                          why="the rail supply's compliance range")] = 0.02


def _dmm_range(value: float) -> float:
    if value not in DMM_RANGES_V:
        refuse(f"{format_quantity(value, 'V')} is not a range of the DMM",
               "ranges: " + ", ".join(f"{r:g} V" for r in DMM_RANGES_V))
    return value


class DmmSpec(Strict):
    nplc: Nplc = 1.0
    range: Annotated[float, quantity("V", gt=0), AfterValidator(_dmm_range)] = 10.0
    autozero: Flag = False


class SequenceFile(Strict):
    """The top level of a sequence file; each entry of `tests` is read by its kind's spec."""

    sequence: Text
    product: Text
    note: Any = None
    supply: SupplySpec
    dmm: DmmSpec = DmmSpec()
    settle: SettleSpec | None = None
    stop_on_fail: Flag = False
    tests: list[Any]
    lot_control: Any = None   # read by station/screen/lot_rules.py


def load_sequence(path: str | Path) -> Sequence:
    return _build(load_yaml_file(path))


def parse_sequence(text: str, file: str = "<text>") -> Sequence:
    return _build(parse_yaml_text(text, file))


DEFAULT_SETTLE = Settle(wait_s=0.05)


def settle_of(spec: SettleSpec | None, default: Settle) -> Settle:
    """The settling policy an entry writes, its unwritten bounds taken from `default`."""
    if spec is None:
        return default
    max_s = spec.max if spec.max is not None else default.max_s
    if spec.wait is not None:
        return Settle(wait_s=spec.wait, min_s=spec.min, max_s=max(max_s, spec.wait))
    if spec.stable_within == "auto":
        return Settle(sigmas=spec.sigmas if spec.sigmas is not None else 2.0,
                      tail_s=spec.tail if spec.tail is not None else 0.04, min_s=spec.min, max_s=max_s)
    assert isinstance(spec.stable_within, float)
    return Settle(stable_rti_v=spec.stable_within, min_s=spec.min, max_s=max_s)


def _build(doc: YamlDocument) -> Sequence:
    top = validate_model(doc, SequenceFile)
    if not top.tests:
        raise doc.error(["tests"], "expected a non-empty list of tests",
                        f"each with a 'kind' out of: {', '.join(TEST_KINDS)}")
    settle = settle_of(top.settle, DEFAULT_SETTLE)
    if top.settle is not None and top.settle.min > settle.max_s:
        raise doc.error(["settle", "min"], "must be from 0 up to 'max'", "lower min or raise max")
    steps = [_step(doc, raw, i, top, settle) for i, raw in enumerate(top.tests)]
    kinds = [s.kind for s in steps]
    for kind in kinds:
        if kinds.count(kind) > 1:
            raise doc.error(["tests"], f"test kind {kind!r} appears more than once",
                            "combine the entries: each figure is measured once per part")
    if "contact" in kinds and kinds[0] != "contact":
        raise doc.error(["tests", kinds.index("contact")], "the contact check must come first",
                        "it finds opens and shorts before the part is measured")
    return Sequence(name=top.sequence, product=top.product, span_v=top.supply.span,
                    compliance_a=top.supply.compliance, dmm_range_v=top.dmm.range,
                    autozero=top.dmm.autozero, tests=tuple(steps), source=doc.file,
                    lot_control=read_lot_control(doc, top.lot_control))


def _step(doc: YamlDocument, raw: Any, i: int, top: SequenceFile, settle: Settle) -> TestStep:
    """One entry of `tests`, validated by the spec of its kind (station/kinds)."""
    path: list[str | int] = ["tests", i]
    if not isinstance(raw, dict) or "kind" not in raw:
        raise doc.error(path, "each test needs a 'kind'", f"one of: {', '.join(TEST_KINDS)}")
    kind = KINDS.get(raw["kind"]) if isinstance(raw["kind"], str) else None
    if kind is None:
        raise doc.error([*path, "kind"], f"unknown test kind {raw['kind']!r}", f"one of: {', '.join(TEST_KINDS)}")
    spec = validate_model(doc, kind.spec, data=raw, at=path, context={"span_v": top.supply.span})
    step_settle = settle_of(spec.settle, settle)
    if spec.settle is not None and spec.settle.min > step_settle.max_s:
        raise doc.error([*path, "settle", "min"], "must be from 0 up to 'max'", "lower min or raise max")
    return TestStep(
        index=i + 1, kind=kind.name, line=doc.line_of(path),
        name=spec.name if spec.name is not None else kind.title,
        nplc=spec.nplc if spec.nplc is not None else top.dmm.nplc,
        average=spec.average, settle=step_settle,
        stop_on_fail=spec.stop_on_fail if spec.stop_on_fail is not None else top.stop_on_fail,
        **kind.step_fields(spec))


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

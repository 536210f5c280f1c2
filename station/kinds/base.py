"""What every test kind provides, and what the sequencer offers a kind while it runs.

A `TestKind` lays out the rows its step logs (`lay_out`), runs the step on the parts of one
handler index (`run`), and may name the rails it programs and refuse a plan before anything
is powered (`rails`, `check_safety`, `check`). Kinds that step the bench through conditions and read the loop
offset at each (offset, common-mode sweep, gain, supply rejection) derive from `SweepKind`:
they only say which conditions, and which figures follow from the readings.

A kind talks to the bench only through `StepScreen`, which the sequencer's index implements.
"""

from __future__ import annotations

import math
from abc import ABC, abstractmethod
from collections.abc import Sequence
from dataclasses import dataclass, field
from typing import TYPE_CHECKING, Any, ClassVar, Protocol

from station.config.regions import Region
from station.config.step_spec import StepSpec
from station.config.test_catalog import StepRows, StepTests, TestDef
from station.judge.budget import Application
from station.judge.measure import Figure
from station.lot.sweep_order import Condition

if TYPE_CHECKING:  # the sequence module imports the registry: types only, no import cycle
    from station.config.bench_config import BenchConfig
    from station.config.limit_tables import LimitTable
    from station.config.sequence import Sequence as TestSequence
    from station.config.sequence import TestStep

CONTACT_MIN_WAIT_S = 0.005  # supply current read-back settles within a few ms


@dataclass(frozen=True)
class KindContext:
    """What a kind needs of the plan to lay out rows and compute figures."""

    span_v: float                   # the sequence's nominal supply span
    regions: tuple[Region, ...]     # the limit table's common-mode regions, low to high
    applications: tuple[Application, ...] = ()  # of the budget step's application file


@dataclass
class SiteWork:
    """What one site's part has gathered so far in this index."""

    site: int
    part_id: str
    raw: list[tuple[TestDef, float]] = field(default_factory=list)
    figures: list[tuple[TestDef, float]] = field(default_factory=list)
    contact: str = "ok"
    stopped: bool = False  # stop-on-fail: no grade can pass any more

    @property
    def live(self) -> bool:
        """Still being measured: made contact and not stopped on a fail."""
        return self.contact == "ok" and not self.stopped


class StepScreen(Protocol):
    """The bench as one index offers it to a kind (conditions set only when they change)."""

    @property
    def context(self) -> KindContext: ...

    @property
    def table(self) -> LimitTable: ...

    def set_rails(self, v_pos: float, v_neg: float) -> None: ...

    def set_force(self, level: float) -> None: ...

    def set_sine(self, frequency_hz: float, amplitude_vrms: float) -> None:
        """The function generator's sine on the difference amplifier's tied inputs."""
        ...

    def generator_output(self, on: bool) -> None: ...

    def read_ac(self, sites: list[int], range_v: float, frequency_hz: float, aperture_s: float,
                samples: int) -> dict[int, float]:
        """Per site, the AC amplitude (V RMS) at its measurement node, the mean of `samples`
        readings through the DMM's AC filter for `frequency_hz`; +inf on overload."""
        ...

    def sweep(self, step: TestStep, sites: list[int], conditions: list[Condition]) -> dict[int, list[float]]:
        """Per site, the input offset (V) at each condition, in the order given."""
        ...

    def measure_iq(self, site: int, wait_s: float) -> float:
        """Power `site` alone, wait, and read the V+ supply current (A)."""
        ...

    def power_sites(self, sites: set[int]) -> None: ...

    def reseat(self, site: int) -> None: ...

    def set_bias(self, sites: list[int], plus: bool, minus: bool) -> None:
        """Rb in series with the + and/or - input of `sites` (False: its shunt closed)."""
        ...

    def bias_rb(self, site: int) -> float:
        """The bias resistor of `site` (Ohm), from the bench config."""
        ...

    def read_offsets(self, step: TestStep, sites: list[int]) -> dict[int, float]:
        """Settle as the step says, then the input offset (V) of each site, as things stand."""
        ...

    def read_after_relay(self, step: TestStep, sites: list[int], before: dict[int, float],
                         rb_in: dict[int, float]) -> dict[int, float]:
        """The input offset (V) of each site after the bias relays moved from a settled state
        whose offsets were `before`, the wait predicted by the step's `predict:` shape;
        `rb_in` is the resistance now in series with each site's inputs (Ohm)."""
        ...

    @property
    def bench_config(self) -> BenchConfig:
        """The bench config (its fixture constants)."""
        ...

    def use_fixture(self, sites: list[int], fixture: str) -> None:
        """Measure `sites` in `fixture` (servo_loop or diff_amp): the switch-over relays of a
        fixture of both kinds; nothing where a site has one fixture only."""
        ...


class TestKind(ABC):
    """One kind of test: `name` is what a sequence writes under `kind:`."""

    __test__ = False  # not a pytest test class, despite the name

    name: ClassVar[str]
    title: ClassVar[str]                   # the test's name when the sequence gives none
    checks_contact: ClassVar[bool] = False  # runs on every seated part and decides its contact
    spec: ClassVar[type[StepSpec]] = StepSpec  # the keys of its entry in a sequence file
    # The fixture the kind measures in (bench config fixture.kind); None: any fixture.
    fixture: ClassVar[str | None] = "servo_loop"

    def step_fields(self, spec: Any) -> dict[str, Any]:
        """The kind's own fields of the TestStep record, from its validated entry (`spec`)."""
        return {}

    @abstractmethod
    def lay_out(self, step: TestStep, rows: StepRows, context: KindContext) -> None:
        """Add the step's raw points and figures to `rows`, in the order they are logged."""

    @abstractmethod
    def run(self, step: TestStep, tests: StepTests, screen: StepScreen, parts: list[SiteWork]) -> None:
        """Measure `parts` (the live ones; every seated one for a contact kind) and add their rows."""

    def rails(self, step: TestStep, span_v: float) -> list[tuple[str, float, float]]:
        """Every (what, V+, V-) the step programs beyond the nominal supply, for the safety check."""
        return []

    def check_safety(self, step: TestStep, sequence: TestSequence) -> None:
        """Refuse (ConfigError) a step the bench must not run, beyond its rails. Nothing by default."""
        return None

    def check(self, step: TestStep, sequence: TestSequence, context: KindContext) -> None:
        """Refuse (ConfigError) a step the limit table's regions cannot judge. Nothing by default."""
        return None

    def check_bench(self, step: TestStep, sequence: TestSequence, bench: BenchConfig) -> None:
        """Refuse (ConfigError) a step the bench's fixture cannot run. Nothing by default."""
        return None


class SweepKind(TestKind):
    """A kind that sets bench conditions one after another and reads every live site's offset."""

    @abstractmethod
    def conditions(self, step: TestStep, span_v: float) -> list[Condition]:
        """The ((V+, V-), force level) of each reading, in the order the readings are logged."""

    @abstractmethod
    def figures(self, step: TestStep, readings: Sequence[float], context: KindContext) -> list[Figure]:
        """The step's figures from its offsets at `conditions` (pure)."""

    def run(self, step: TestStep, tests: StepTests, screen: StepScreen, parts: list[SiteWork]) -> None:
        conditions = self.conditions(step, screen.context.span_v)
        values = screen.sweep(step, [p.site for p in parts], conditions)
        for part in parts:
            readings = values[part.site]
            if tests.raw:  # a one-reading kind (offset) logs its reading as the figure itself
                part.raw.extend(zip(tests.raw, readings, strict=True))
            part.figures.extend(figure_rows(self.figures(step, readings, screen.context), tests.figures))


def figure_rows(figures: Sequence[Figure], defs: Sequence[TestDef]) -> list[tuple[TestDef, float]]:
    """Each laid-out figure with its computed value (nan when the math gave none)."""
    by_key = {(f.param, f.region): f.value for f in figures}
    return [(test, by_key.get((test.param, test.region), math.nan)) for test in defs]


def current_wait(step: TestStep) -> float:
    """How long a supply-current reading waits after a site is powered."""
    settle = step.settle
    return settle.wait_s if not settle.adaptive and settle.wait_s else max(settle.min_s, CONTACT_MIN_WAIT_S)

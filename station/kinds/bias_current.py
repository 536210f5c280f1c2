"""Input bias and offset current: Rb in series with each input in turn, then both.

At nominal supply and mid common-mode the loop reads the offset with both shunts across Rb
closed, then with the + shunt open, with the - shunt open and with both open (each step moves
one relay, so each settles from a small step); the shunts are closed again at the end. The
currents follow from the offset changes over Rb (station/judge/measure.bias_figures). Rb per
site and the relay channels come from the bench config (`fixture.bias`); settling and
integration from the sequence, like every reading.
"""

from __future__ import annotations

from typing import TYPE_CHECKING, Annotated, Any

from station.config.approach import Approach
from station.config.fields import Strict, plain_number, quantity
from station.config.files import ConfigError
from station.config.rail_points import rails_for
from station.config.step_spec import SLIP_S, PositiveSeconds, Seconds, StepSpec
from station.config.test_catalog import StepRows, StepTests
from station.judge.measure import bias_figures
from station.kinds.base import KindContext, SiteWork, StepScreen, TestKind, figure_rows

if TYPE_CHECKING:
    from station.config.bench_config import BenchConfig
    from station.config.sequence import Sequence as TestSequence
    from station.config.sequence import TestStep

# (Rb in the + input, Rb in the - input) of each reading, in the order logged ...
STATES = ((False, False), (True, False), (False, True), (True, True))
_TEXT = ("Vos with Rb shunted", "Vos with Rb in + input", "Vos with Rb in - input", "Vos with Rb in both inputs")
# ... and in the order visited: one relay moves per step.
VISIT = (0, 1, 3, 2)


class PredictSpec(Strict):
    """predict: the shape of the approach after a bias relay moves (fixture characterisation)."""

    tau: PositiveSeconds            # slowest fast constant: Rb x C of the fixture, or the loop's
    tail: PositiveSeconds           # dielectric absorption's time constant ...
    tail_share: Annotated[float, plain_number(ge=0, le=0.5, why="a share of the step, e.g. 0.01")]
    delay: Seconds = 0.0            # relay operate time: the approach starts this late
    max: Annotated[float, quantity("s", gt=0, le=60, why=SLIP_S)] = 0.5
    sigmas: Annotated[float, plain_number(gt=0, le=10)] = 1.0


class BiasCurrentSpec(StepSpec):
    predict: PredictSpec | None = None


class BiasCurrent(TestKind):
    name = "bias_current"
    title = "Input bias current"
    spec = BiasCurrentSpec

    def step_fields(self, spec: BiasCurrentSpec) -> dict[str, Any]:
        shape = spec.predict
        if shape is None:
            return {}
        return {"predict": Approach(shape.tau, shape.tail, shape.tail_share, shape.delay, shape.max, shape.sigmas)}

    def lay_out(self, step: TestStep, rows: StepRows, context: KindContext) -> None:
        for text in _TEXT:
            rows.raw_point(text, "vos_rb")
        rows.figure("Ib+ (+ input bias current)", "ib_plus")
        rows.figure("Ib- (- input bias current)", "ib_minus")
        rows.figure("Ib (mean input bias current)", "ib")
        rows.figure("Ios (input offset current)", "ios")
        rows.figure("Ios from both Rb in (check)", "ios_both")

    def run(self, step: TestStep, tests: StepTests, screen: StepScreen, parts: list[SiteWork]) -> None:
        sites = [p.site for p in parts]
        screen.set_rails(*rails_for(0.0, screen.context.span_v))
        readings: dict[int, list[float]] = {site: [0.0] * len(STATES) for site in sites}
        for n, i in enumerate(VISIT):
            screen.set_bias(sites, *STATES[i])
            if step.predict is None or n == 0:   # the first state follows the step before: detect
                found = screen.read_offsets(step, sites)
            else:                                # one relay moved from a settled state: predict
                in_series = sum(STATES[i])   # Rb in 0, 1 or 2 inputs
                before = {site: readings[site][VISIT[n - 1]] for site in sites}
                rb_in = {site: screen.bias_rb(site) * in_series for site in sites}
                found = screen.read_after_relay(step, sites, before, rb_in)
            for site, value in found.items():
                readings[site][i] = value
        screen.set_bias(sites, False, False)  # after a fault the index shunts Rb on its way out
        for part in parts:
            values = readings[part.site]
            part.raw.extend(zip(tests.raw, values, strict=True))
            base, plus, minus, both = values
            figures = bias_figures(base, plus, minus, both, screen.bias_rb(part.site))
            part.figures.extend(figure_rows(figures, tests.figures))

    def check_bench(self, step: TestStep, sequence: TestSequence, bench: BenchConfig) -> None:
        if bench.bias is None:
            bench_file = str(bench.source) if bench.source is not None else "the bench config"
            raise ConfigError(sequence.source, f"a bias_current test needs bias resistors, but {bench_file} "
                              "has no fixture.bias", line=step.line, key=f"tests[{step.index - 1}]",
                              hint="add fixture.bias (rb, plus and minus channels per site; docs/bench-commands.md) "
                                   "or remove the test")

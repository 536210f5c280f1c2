"""Input bias and offset current: Rb in series with each input in turn, then both.

At nominal supply and mid common-mode the loop reads the offset with both shunts across Rb
closed, then with the + shunt open, with the - shunt open and with both open (each step moves
one relay, so each settles from a small step); the shunts are closed again at the end. The
currents follow from the offset changes over Rb (station/judge/measure.bias_figures). Rb per
site and the relay channels come from the bench config (`fixture.bias`); settling and
integration from the sequence, like every reading.
"""

from __future__ import annotations

from typing import TYPE_CHECKING

from station.config.files import ConfigError
from station.config.rail_points import rails_for
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


class BiasCurrent(TestKind):
    name = "bias_current"
    title = "Input bias current"

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
        for i in VISIT:
            screen.set_bias(sites, *STATES[i])
            for site, value in screen.read_offsets(step, sites).items():
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

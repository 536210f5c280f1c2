"""Everything a lot needs decided before the first part: sequence, limits, bench, test numbers.

`build_plan` loads and cross-checks the three files and refuses, before anything is powered,
a sequence that the bench's safety limits or the limit table's regions do not allow.
"""

from __future__ import annotations

from dataclasses import dataclass
from pathlib import Path

from drivers.handler import MAX_BIN as HANDLER_MAX_BIN
from drivers.handler import MIN_BIN as HANDLER_MIN_BIN
from station.config.bench_config import BenchConfig, load_bench_config
from station.config.files import ConfigError, load_yaml_file
from station.config.limit_tables import LimitTable, load_limit_table
from station.config.sequence import (
    Sequence,
    TestStep,
    check_bench_safety,
    load_sequence,
)
from station.config.test_catalog import StepTests, TestDef
from station.kinds.base import KindContext
from station.kinds.budget import applications_file, applications_of, check_application_limits
from station.kinds.registry import kind_of, step_tests


@dataclass(frozen=True)
class ScreenPlan:
    sequence: Sequence
    table: LimitTable
    bench: BenchConfig
    context: KindContext                        # the span and the table's regions, for the kinds
    steps: dict[int, StepTests]                 # step index -> the rows it logs
    tests: list[TestDef]                        # every loggable test, in execution order
    sequence_path: Path
    limits_path: Path
    bench_path: Path

    test_order: dict[int, int]                  # test number -> position in execution order
    applications_path: Path | None = None       # the budget step's application file

    def order_of(self, test_num: int) -> int:
        """Position of a test number in execution order (unknown numbers last)."""
        return self.test_order.get(test_num, len(self.test_order))

    def step_tests(self, step: TestStep) -> StepTests:
        return self.steps[step.index]


def check_bins_fit_handler(table: LimitTable, path: Path) -> None:
    """Every hard bin a part can be sorted to must be one the handler has (STDF allows 0-32767,
    a handler far fewer): refused before the lot, not after the first index."""
    doc = load_yaml_file(path)
    used: list[tuple[list[str | int], int]] = [
        *((list[str | int](["grades", i, "hard_bin"]), grade.hard_bin) for i, grade in enumerate(table.grades)),
        (["fail_hard_bin"], table.fail_hard_bin),
        (["contact", "hard_bin"], table.contact.hard_bin),
        (["tester_fault", "hard_bin"], table.tester_fault_hard_bin),
    ]
    for key, number in used:
        if not HANDLER_MIN_BIN <= number <= HANDLER_MAX_BIN:
            raise doc.error(key, f"hard bin {number} is not one the handler can sort to "
                            f"({HANDLER_MIN_BIN} to {HANDLER_MAX_BIN})",
                            f"renumber the hard bins to {HANDLER_MIN_BIN}-{HANDLER_MAX_BIN}")


def check_fixtures(sequence: Sequence, bench: BenchConfig) -> None:
    """Refuse a test whose fixture (its kind's) some site of the bench lacks."""
    for step in sequence.tests:
        needed = kind_of(step).fixture
        if needed is None or bench.has_fixture(needed):
            continue
        lacking = [site for site in range(1, bench.sites + 1) if needed not in bench.site_fixtures(site)]
        bench_file = f"{bench.source}:{bench.fixture_line}" if bench.source and bench.fixture_line else (
            str(bench.source) if bench.source else "the bench config")
        raise ConfigError(sequence.source, f"the {step.kind} test needs the {needed} fixture, which site "
                          f"{', '.join(map(str, lacking))} of the bench lacks (fixture.kind, {bench_file})",
                          hint=f"remove the test, or use a bench whose fixture.kind is {needed} or both",
                          line=step.line, key=f"tests[{step.index - 1}]")


def build_plan(bench_path: Path, sequence_path: Path, limits_path: Path) -> ScreenPlan:
    """Load and cross-check; any problem is a ConfigError naming the file and what to fix."""
    bench = load_bench_config(bench_path)
    sequence = load_sequence(sequence_path)
    table = load_limit_table(limits_path)
    if sequence.product != table.product:
        raise ConfigError(sequence.source, f"sequence is for product {sequence.product!r} but the "
                          f"limit table {table.source} is for {table.product!r}",
                          hint="pick the limit table of the same product")
    check_fixtures(sequence, bench)
    check_bench_safety(sequence, bench.max_rail_v, bench.compliance_a)
    if bench.has_handler:
        check_bins_fit_handler(table, Path(limits_path))
    from station.config.resolution import resolution_problems

    unresolved = resolution_problems(bench, sequence, table)
    if unresolved:                # a limit the fixture cannot resolve would sort on noise
        raise unresolved[0]
    applications = applications_of(sequence, Path(sequence_path))
    check_application_limits(table, applications)
    from station.kinds.ac_cmrr import frequency_limit_problems

    unsweepable = frequency_limit_problems(table, sequence)
    if unsweepable:               # a limit no part of the sweep could be judged against
        raise unsweepable[0]
    context = KindContext(sequence.span_v, table.regions, applications)
    for step in sequence.tests:
        kind_of(step).check(step, sequence, context)
        kind_of(step).check_bench(step, sequence, bench)
    steps = {step.index: step_tests(step, context) for step in sequence.tests}
    tests = [test for step in sequence.tests for test in steps[step.index].in_order]
    return ScreenPlan(sequence=sequence, table=table, bench=bench, context=context, steps=steps,
                      tests=tests, test_order={t.test_num: i for i, t in enumerate(tests)},
                      sequence_path=Path(sequence_path),
                      limits_path=Path(limits_path), bench_path=Path(bench_path),
                      applications_path=applications_file(sequence, Path(sequence_path)))

"""Application error budget: no bench work; each part's own figures, measured by the steps
before it, give its input-referred error in each application of the step's application file
(station/judge/budget). Logged per application (REGION = the application's name): the
direct sum and the RSS, which a grade may limit, and the four terms.
"""

from __future__ import annotations

import math
from collections.abc import Sequence
from pathlib import Path
from typing import TYPE_CHECKING, Any

from station.config.applications import load_applications
from station.config.fields import Text
from station.config.files import ConfigError
from station.config.parameters import PARAMETERS
from station.config.step_spec import StepSpec
from station.config.test_catalog import StepRows, StepTests, TestDef
from station.judge.budget import Application, BudgetError, PartFigures, part_budget
from station.kinds.base import KindContext, SiteWork, StepScreen, TestKind

if TYPE_CHECKING:
    from station.config.limit_tables import LimitTable
    from station.config.sequence import Sequence as TestSequence
    from station.config.sequence import TestStep

# Logged per application, in this order: (param, text)
ROWS = (("app_err", "error, direct sum"), ("app_err_rss", "error, RSS"), ("app_err_vos", "offset term"),
        ("app_err_cm", "common-mode term"), ("app_err_out", "output term"), ("app_err_ib", "bias term"))
NEEDS = ("offset", "cm_sweep", "gain")   # the steps whose figures every budget takes


def step_regions(context: KindContext) -> list[tuple[float, float]]:
    """The crossover (step) regions as common mode at the tested span."""
    return [r.vcm_range(context.span_v) for r in context.regions if r.kind == "step"]


def figures_of(raw: list[tuple[TestDef, float]], figures: list[tuple[TestDef, float]]) -> PartFigures:
    """A part's budget inputs from its logged rows (in a lot, or read back from a datalog)."""
    by_param = {t.param: v for t, v in figures}
    points = tuple((t.vcm, v) for t, v in raw if t.param == "vos_cm" and t.vcm is not None)
    return PartFigures(vos=by_param.get("vos", math.nan), aol_slope=by_param.get("aol_slope", math.nan),
                       cm_points=points, ib_plus=by_param.get("ib_plus", math.nan),
                       ib_minus=by_param.get("ib_minus", math.nan))


def budget_values(app: Application, part: PartFigures, context: KindContext) -> dict[str, float]:
    """param -> value of one application's rows (nan where the part's figures give none)."""
    try:
        budget = part_budget(app, part, context.span_v, step_regions(context))
    except BudgetError:
        return {param: math.nan for param, _ in ROWS}
    return {"app_err": budget.direct, "app_err_rss": budget.rss, "app_err_vos": budget.vos,
            "app_err_cm": budget.cm, "app_err_out": budget.out, "app_err_ib": budget.ib}


class BudgetSpec(StepSpec):
    applications: Text   # the application file, relative to the sequence file


class ErrorBudget(TestKind):
    name = "budget"
    fixture = None   # computes from the other steps' figures
    title = "Application error budget"
    spec = BudgetSpec

    def step_fields(self, spec: BudgetSpec) -> dict[str, Any]:
        return {"applications": spec.applications}

    def lay_out(self, step: TestStep, rows: StepRows, context: KindContext) -> None:
        for app in context.applications:
            for param, text in ROWS:
                rows.figure(f"{app.name}: {text}", param, app.name, None)

    def run(self, step: TestStep, tests: StepTests, screen: StepScreen, parts: list[SiteWork]) -> None:
        apps = {a.name: a for a in screen.context.applications}
        for part in parts:
            figures = figures_of(part.raw, part.figures)
            values = {name: budget_values(app, figures, screen.context) for name, app in apps.items()}
            part.figures.extend((test, values[test.region][test.param]) for test in tests.figures
                                if test.region is not None)

    def check(self, step: TestStep, sequence: TestSequence, context: KindContext) -> None:
        """The figures the budget needs come before it; every application lies in the sweep."""
        key = f"tests[{step.index - 1}]"
        before = {s.kind for s in sequence.tests if s.index < step.index}
        missing = [k for k in NEEDS if k not in before]
        if any(a.source_ohm > 0 for a in context.applications) and "bias_current" not in before:
            missing.append("bias_current")
        if missing:
            raise ConfigError(sequence.source, f"the budget needs {', '.join(missing)} before it", line=step.line,
                              key=key, hint="put the budget after those tests, or add them")
        vcms = sequence.steps("cm_sweep")[0].point_vcms(context.span_v)
        for app in context.applications:
            problem = application_problem(app, vcms, context)
            if problem:
                raise ConfigError(sequence.source, problem, line=step.line, key=key,
                                  hint="change the application file, or widen the common-mode sweep")


def application_problem(app: Application, vcms: Sequence[float], context: KindContext) -> str | None:
    """Why the parts tested with these common-mode points and regions cannot give `app`'s
    budget (its supply, its range beyond the sweep, its name taken by a region), or None."""
    if app.name in {r.name for r in context.regions}:
        return f"application {app.name!r} has the name of a common-mode region"
    flat = PartFigures(0.0, 0.0, tuple((v, 0.0) for v in vcms), 0.0, 0.0)
    try:
        part_budget(app, flat, context.span_v, step_regions(context))
    except BudgetError as exc:
        return str(exc)
    return None


DATALOG_COPY = "applications.yaml"   # the copy in a datalog folder (station/datalog/folder.py)


def applications_file(sequence: TestSequence, sequence_path: Path) -> Path | None:
    """The application file of the sequence's budget step, relative to the sequence file; for
    the sequence copy in a datalog folder, the folder's copy of the application file."""
    for step in sequence.steps("budget"):
        assert step.applications is not None
        folder = Path(sequence_path).parent
        written = folder / step.applications
        if not written.is_file() and (folder / "lot.json").is_file():
            return folder / DATALOG_COPY
        return written
    return None


def applications_of(sequence: TestSequence, sequence_path: Path) -> tuple[Application, ...]:
    """The applications of the sequence's budget step (none without one)."""
    path = applications_file(sequence, sequence_path)
    return load_applications(path) if path is not None else ()


def check_application_limits(table: LimitTable, applications: tuple[Application, ...]) -> None:
    """Every limit on a budget row names an application of the sequence."""
    names = {a.name for a in applications}
    for grade in table.grades:
        for limit in grade.limits:
            if PARAMETERS[limit.param].region_kind == "application" and limit.region not in names:
                known = ", ".join(sorted(names)) or "none: the sequence has no budget step"
                raise ConfigError(table.source, f"grade {grade.name}: {limit.param} limit names application "
                                  f"{limit.region!r}, which the sequence does not budget",
                                  hint=f"applications: {known}")

"""`station limits guard` and `station limits set`: limit tables changed in place with the
file's comments kept, the whole table checked, and a change record appended
(station/config/limit_edit.py). Added to the `limits` group of review_commands.py."""

from __future__ import annotations

from pathlib import Path

import click
from rich.table import Table

from station.cli.review_commands import BadInput, _console, limits_group
from station.config.files import ConfigError
from station.errors import Refused


def _refuse_grade_order(editable, table, verb: str) -> None:
    from station.config.limit_edit import grade_order_problems

    for grade, param, region, why in grade_order_problems(table):
        _, entry = editable.limit_entry(grade, param, region)
        line = entry.lc.line + 1
        raise Refused(f"{editable.path}:{line}: grade {grade} {param} {region or ''}: {why} "
                      f"({verb} would make a better grade looser than the next; change that grade too)".replace("  ", " "))


def check_fixture_resolution(table, bench_file: Path, sequence_file: Path | None) -> None:
    """`limits check --bench`: every limit the fixture cannot resolve, one line each; exit 2 if any."""
    from station.config.bench_config import load_bench_config
    from station.config.resolution import resolution_problems
    from station.config.sequence import load_sequence
    from station.demo import DEMO_SEQUENCE

    try:
        bench = load_bench_config(bench_file)
        sequence = load_sequence(sequence_file or DEMO_SEQUENCE)
        problems = resolution_problems(bench, sequence, table)
    except ConfigError as exc:
        raise BadInput(exc.one_line()) from None
    if bench.resolution is None:
        click.echo(f"{bench_file}: states no fixture resolution (fixture.resolution): not checked")
        return
    for problem in problems:
        click.echo(problem.one_line(), err=True)
    if problems:
        raise BadInput(f"{len(problems)} limit(s) the fixture of {bench_file} cannot resolve")
    click.echo(f"every limit is within what the fixture of {bench_file} resolves")


@limits_group.command("set")
@click.argument("file", type=click.Path(path_type=Path))
@click.option("--grade", required=True, help="Grade name, e.g. A.")
@click.option("--param", required=True, help="Parameter, e.g. cmrr.")
@click.option("--region", default=None, help="Region, for parameters that take one.")
@click.option("--low", default=None, help='New low limit with its unit, e.g. "118 dB".')
@click.option("--high", default=None, help='New high limit with its unit, e.g. "60 uV".')
@click.option("--reason", required=True, help="Why (kept in the change record).")
@click.option("--who", default=None, help="Who changes it [default: the login name].")
def limits_set(file: Path, grade: str, param: str, region: str | None, low: str | None, high: str | None,
               reason: str, who: str | None) -> None:
    """Change one limit of FILE in place: the comments and layout kept, the whole table checked,
    a change record appended (see `limits show --history`)."""
    from station.config.limit_edit import read_editable, write_text, yaml_scalar

    if low is None and high is None:
        raise Refused("give --low, --high or both (the new limit with its unit)")
    if not reason.strip():
        raise Refused("--reason must say why the limit changes")
    try:
        editable = read_editable(file)
        _, entry = editable.limit_entry(grade, param, region)
        said = []
        for side, value in (("low", low), ("high", high)):
            if value is None:
                continue
            old = str(entry[side]) if side in entry else None
            editable.set_value(entry, side, yaml_scalar(value.strip()))
            what = f"grade {grade} {param}{' ' + region if region else ''} {side}"
            editable.add_change(what, old, value.strip(), reason.strip(), who)
            said.append(f"{what}: {old or 'none'} -> {value.strip()}")
        text, table = editable.validated()
        _refuse_grade_order(editable, table, "this change")
    except ConfigError as exc:
        raise BadInput(exc.one_line()) from None
    write_text(file, text)
    console = _console()
    for line in said:
        console.print(f"{file}:{entry.lc.line + 1}: {line}; change recorded", markup=False)


@limits_group.command("guard")
@click.argument("limits_file", type=click.Path(path_type=Path))
@click.option("--study", "studies", multiple=True, required=True, type=click.Path(path_type=Path),
              help="Study folder (station study run); repeat for several stations.")
@click.option("--rule", type=click.Choice(["guarded", "simple"]), default="guarded", show_default=True,
              help="guarded: acceptance = spec moved in by k u; simple: acceptance = spec.")
@click.option("--k", "k", type=click.FloatRange(0, 10), default=2.0, show_default=True,
              help="Coverage factor: the guard band is w = k u.")
@click.option("--max-share", type=click.FloatRange(0, 1), default=0.25, show_default=True,
              help="Warn where the guard bands take more than this share of a tolerance.")
@click.option("--out", "out_file", type=click.Path(dir_okay=False, path_type=Path), required=True,
              help="The guard-banded limit table to write.")
@click.option("--reason", default=None, help="Why (kept in the change record).")
@click.option("--force", is_flag=True, help="Overwrite --out if it exists.")
def limits_guard(limits_file: Path, studies: tuple[Path, ...], rule: str, k: float, max_share: float,
                 out_file: Path, reason: str | None, force: bool) -> None:
    """Write a copy of LIMITS_FILE whose acceptance limits sit inside the spec limits by k u (u:
    the study's GRR per figure); both limits are kept in the file (spec_low/spec_high)."""
    from station.config.limit_edit import read_editable, write_text
    from station.config.limit_tables import load_limit_table
    from station.datalog.folder import DatalogError
    from station.qualify.guard import guard_table
    from station.qualify.study import load_study, study_report

    if out_file.exists() and not force:
        raise Refused(f"--out {out_file}: exists (give another name, or --force)")
    if out_file.resolve() == limits_file.resolve():
        raise Refused("--out must be a new file: the spec table stays as it is")
    try:
        editable = read_editable(limits_file)
        table = load_limit_table(limits_file)
        report = study_report(load_study(list(studies)), table)
        names = ", ".join(p.name for p in studies)
        lines = guard_table(editable, table, report, rule, k, max_share, names)
        editable.add_change("guard bands", "acceptance = spec", f"{rule} acceptance, w = {k:g} u",
                            reason or f"guard bands from study {names}")
        text, new_table = editable.validated(out_file)
        _refuse_grade_order(editable, new_table, "the guard bands")
    except ConfigError as exc:
        raise BadInput(exc.one_line()) from None
    except DatalogError as exc:
        raise BadInput(str(exc)) from None
    write_text(out_file, text)
    console = _console()
    view = Table(title=f"guard bands ({rule}, k = {k:g}) from {names}", header_style="bold", title_justify="left")
    for column in ("grade", "figure", "spec", "u", "w", "acceptance", "share", "note"):
        view.add_column(column)
    from station.review.units import fmt

    for g in lines:
        view.add_row(g.grade, g.figure, g.spec, fmt(g.u, g.units, 3, True) if g.units else "",
                     fmt(g.w, g.units, 3, True) if g.units else "", g.acceptance,
                     "" if g.share != g.share else f"{100 * g.share:.1f} %", g.note)
    console.print(view)
    for g in lines:
        if g.note.startswith("guard takes"):
            console.print(f"WARNING: grade {g.grade} {g.figure}: {g.note}", style="bold yellow", markup=False)
    console.print(f"guard-banded table: {out_file} (acceptance limits in low/high, spec limits in spec_low/spec_high)")


@click.command("correlate")
@click.option("--bench", "bench_path", type=click.Path(path_type=Path), required=True, help="Bench config (YAML).")
@click.option("--units", "units_path", type=click.Path(path_type=Path), required=True,
              help="Correlation units file: reference parts with reference values and tolerances.")
@click.option("--out", type=click.Path(path_type=Path), required=True, help="Datalog folder of the correlation run.")
@click.option("--sequence", "sequence_path", type=click.Path(path_type=Path), default=None,
              help="Sequence [default: the demo product's].")
@click.option("--limits", "limits_path", type=click.Path(path_type=Path), default=None,
              help="Limit table [default: the demo product's].")
@click.option("--lot", "lot_id", default=None, help="Lot id of the run [default: CORR-<date>-<time>].")
@click.option("--operator", default="", help="Operator name for the datalog.")
@click.option("--force", is_flag=True, help="Overwrite an existing folder.")
def correlate_command(bench_path: Path, units_path: Path, out: Path, sequence_path: Path | None,
                      limits_path: Path | None, lot_id: str | None, operator: str, force: bool) -> None:
    """Test the correlation units on the bench (the handler presents them, or the operator seats
    them) and compare each figure with its reference: exit 2 when any is out of correlation."""
    import json
    import sys
    import time

    from rich.console import Console

    from station.cli.main import LotJob, _lot_id, _operator, _run_lot
    from station.datalog.folder import LOT_JSON, write_atomically
    from station.datalog.seal import seal_datalog
    from station.demo import DEMO_LIMITS, DEMO_SEQUENCE
    from station.qualify.correlation import correlate, load_units
    from station.review.load import read_datalog_folder

    try:
        units = load_units(units_path)
    except ConfigError as exc:
        raise BadInput(exc.one_line()) from None
    lot_id = _lot_id(lot_id) or time.strftime("CORR-%Y%m%d-%H%M%S")
    console = Console()
    job = LotJob(bench_path, sequence_path or DEMO_SEQUENCE, limits_path or DEMO_LIMITS, out, lot_id,
                 _operator(operator), "run", force, len({r.unit for r in units.references}),
                 extra_header={"correlation_run": {"units_file": str(units_path)}})
    code = _run_lot(job, console)
    if code != 0:
        sys.exit(code)
    _, _, results, _ = read_datalog_folder(out)
    findings = correlate(results, units)
    bad = [f for f in findings if not f.in_correlation]
    header = json.loads((out / LOT_JSON).read_text(encoding="utf-8"))
    header["correlation"] = {"units_file": str(units_path), "in_correlation": not bad,
                             "figures": [f.record() for f in findings]}
    write_atomically(out / LOT_JSON, json.dumps(header, indent=2) + "\n")
    seal_datalog(out)                   # the manifest again, over the lot.json with the result
    for finding in findings:
        console.print(finding.line(), style=None if finding.in_correlation else "bold red", markup=False)
    if bad:
        first = bad[0]
        raise Refused(f"station out of correlation: {first.line()}"
                      + (f" (and {len(bad) - 1} more)" if len(bad) > 1 else "")
                      + "; do not test: check the fixture and the instruments, then correlate again")
    console.print(f"station in correlation on {len(findings)} figure(s) of "
                  f"{len({f.ref.unit for f in findings})} unit(s); result in {out / LOT_JSON}")

"""`station study run` and `station study report`: the station's repeatability study.

A study runs the production sequence on a few parts, each measured `--repeats` times in
every site, and logs a normal datalog folder whose lot.json says it is a study (`study`).
The report reads such folders only (station/qualify/).
"""

from __future__ import annotations

import sys
import tempfile
import time
from pathlib import Path

import click
import yaml
from rich.console import Console

from station.demo import DEMO_LIMITS, DEMO_SEQUENCE
from station.errors import Refused


@click.group("study")
def study_group() -> None:
    """Repeatability and reproducibility study of the station (GRR)."""


@study_group.command("run")
@click.option("--parts", type=click.IntRange(2, 50), default=5, show_default=True,
              help="Parts in the study (each measured in every site).")
@click.option("--repeats", type=click.IntRange(2, 20), default=3, show_default=True,
              help="Measurements of each part in each site.")
@click.option("--sites", type=click.IntRange(1, 4), default=4, show_default=True)
@click.option("--reseat/--no-reseat", default=True, show_default=True,
              help="Re-seat the part between repeats (else its repeats follow in one site, untouched).")
@click.option("--seed", type=int, default=1, show_default=True, help="Seed of the simulated parts.")
@click.option("--bench-errors", "bench_seed", type=int, default=None,
              help="Give the simulated bench its own errors (site offset, DMM gain, leakage) from this seed.")
@click.option("--station", "station_name", default="sim-bench", show_default=True,
              help="Station name logged in lot.json (several stations: one study folder each).")
@click.option("--out", type=click.Path(path_type=Path), required=True, help="Study datalog folder.")
@click.option("--lot", "lot_id", default=None, help="Study id [default: STUDY-<date>-<time>].")
@click.option("--operator", default="demo", show_default=True)
@click.option("--sequence", "sequence_path", type=click.Path(path_type=Path), default=DEMO_SEQUENCE,
              help="The production sequence [default: the demo product's].")
@click.option("--limits", "limits_path", type=click.Path(path_type=Path), default=DEMO_LIMITS,
              help="Limit table [default: the demo product's].")
@click.option("--speed", type=click.FloatRange(0.1, 1000), default=1.0, show_default=True,
              help="Simulated time per wall time.")
@click.option("--force", is_flag=True, help="Overwrite an existing folder.")
def study_run(parts: int, repeats: int, sites: int, reseat: bool, seed: int, bench_seed: int | None,
              station_name: str, out: Path, lot_id: str | None, operator: str, sequence_path: Path,
              limits_path: Path, speed: float, force: bool) -> None:
    """Run a repeatability study on the simulated bench: PARTS x REPEATS x SITES measurements
    with the production sequence (docs/qualification.md)."""
    from sim_instruments.bench import SimBench, SimSettings
    from sim_instruments.bench_errors import BenchErrorSpec
    from sim_instruments.study_plan import make_study_plan
    from station.cli.main import _SIM_KEYS, LotJob, _lot_id, _operator, _run_lot

    if not station_name.strip() or not station_name.isprintable():
        raise Refused(f"--station {station_name!r}: give a plain station name")
    lot_id = _lot_id(lot_id) or time.strftime("STUDY-%Y%m%d-%H%M%S")
    operator = _operator(operator)
    plan = make_study_plan(parts, repeats, sites, reseat)
    spec = BenchErrorSpec(seed=bench_seed) if bench_seed is not None else None
    settings = SimSettings(seed=seed, sites=sites, parts=parts, speed=speed, defects=False,
                           study_plan=plan, bench_errors=spec)
    console = Console()
    with SimBench(settings) as sim, tempfile.TemporaryDirectory() as temp:
        config = yaml.safe_load(sim.bench_config_text())
        config["station"] = station_name.strip()
        bench_file = Path(temp) / "bench.yaml"
        bench_file.write_text("# Bench config of the simulated bench for this study (written by the station).\n"
                              + yaml.safe_dump(config, sort_keys=False), encoding="utf-8")
        dry_run = {key: getattr(settings, key) for key in _SIM_KEYS}
        dry_run["bench_errors"] = sim.bench_errors_truth()
        study = {"parts": parts, "repeats": repeats, "sites": sites, "reseat": reseat,
                 "indexes": len(plan.indexes)}
        console.print(f"study: {parts} part(s) x {repeats} repeat(s) x {sites} site(s) on the simulated "
                      f"bench ({len(plan.indexes)} indexes; "
                      + ("re-seated between repeats" if reseat else "left seated for the repeats")
                      + ("; bench errors from seed " + str(bench_seed) if spec else "; exact bench") + ")")
        job = LotJob(bench_file, sequence_path, limits_path, out, lot_id, operator, "dry-run", force,
                     sum(i is not None for index in plan.indexes for i in index), False, None, 3, {"dry_run": dry_run, "study": study})
        code = _run_lot(job, console, write_truth=sim.write_truth)
    if code == 0:
        console.print(f"study datalog: {out}; next: station study report {out}")
    sys.exit(code)


@study_group.command("report")
@click.argument("studies", nargs=-1, required=True, type=click.Path(path_type=Path))
@click.option("--limits", "limits_file", type=click.Path(path_type=Path), default=None,
              help="Limit table to judge the GRR against [default: the study's own limits.yaml].")
@click.option("--html", "html_file", type=click.Path(dir_okay=False, path_type=Path), default=None,
              help="Also write the report as one HTML page.")
def study_report_command(studies: tuple[Path, ...], limits_file: Path | None, html_file: Path | None) -> None:
    """Variance components (crossed ANOVA, part x site), GRR, %GRR of tolerance, ndc and a verdict
    per figure and limit, from one or more study folders (several stations: one folder each)."""
    from station.cli.review_commands import _console, _refuse_unwritable, _table
    from station.datalog.folder import DatalogError
    from station.qualify.study import load_study, study_report
    from station.qualify.study_view import components_table, notes, verdict_table, write_study_html

    _refuse_unwritable("--html", html_file)
    console = _console()
    try:
        logs = load_study(list(studies))
    except DatalogError as exc:
        raise Refused(str(exc)) from None
    table_path = limits_file or logs.limits_files[0]
    table = _table(table_path) if table_path is not None else None
    report = study_report(logs, table)
    console.print(components_table(report))
    console.print(verdict_table(report))
    for line in notes(report):
        console.print(f"note: {line}", markup=False, highlight=False)
    if html_file is not None:
        write_study_html(report, html_file)
        console.print(f"HTML report: {html_file}")

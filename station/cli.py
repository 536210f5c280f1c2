"""The `station` command: screen lots on a bench, dry-run them on the simulated bench, review them.

Exit codes scripts can rely on: 0 done; 2 refused input (a bad file or option: nothing was
powered and nothing written); 3 the lot was stopped (instrument failure, Ctrl-C, SIGTERM:
the bench was put in its safe state and the datalog holds every finished part).
"""

from __future__ import annotations

import signal
import sys
import tempfile
import time
from pathlib import Path

import click
import yaml
from rich.console import Console

import limits as limits_package
import sequences as sequences_package
from drivers.errors import InstrumentError, RequestRefused
from station import __version__
from station.config_files import ConfigError
from station.datalog import DatalogError, DatalogWriter

EXIT_REFUSED = 2
EXIT_STOPPED = 3
DEMO_SEQUENCE = Path(sequences_package.__file__).parent / "px401_screen.yaml"
DEMO_LIMITS = Path(limits_package.__file__).parent / "px401.yaml"


class Refused(click.ClickException):
    """Bad input: one clear line, exit 2, nothing powered."""

    exit_code = EXIT_REFUSED


def _terminate(signum, frame) -> None:
    from station.runner import LotInterrupted

    raise LotInterrupted(f"stopped by signal {signal.Signals(signum).name}")


@click.group(context_settings={"help_option_names": ["-h", "--help"]})
@click.version_option(__version__, prog_name="station")
def main() -> None:
    """Screen precision op-amps on a bench of SCPI instruments, or dry-run on the simulated bench."""


def _run_lot(bench_path: Path, sequence_path: Path, limits_path: Path, out: Path, lot_id: str,
             operator: str, mode: str, force: bool, console: Console, expected_parts: int | None,
             after=None, stdf: bool = False) -> int:
    """Plan, open the bench, run the lot with progress, print the summary. Returns the exit code."""
    from station.bench import open_bench
    from station.console import LotProgress, bin_summary, lot_line
    from station.runner import LotRunner, LotSettings
    from station.screen_plan import build_plan

    try:
        plan = build_plan(bench_path, sequence_path, limits_path)
        writer = DatalogWriter(out, force=force)
    except (ConfigError, DatalogError) as exc:
        raise Refused(str(exc)) from None
    try:
        bench = open_bench(plan.bench)
    except (InstrumentError, RequestRefused) as exc:
        raise click.ClickException(f"cannot open the bench: {exc}") from None
    previous = signal.signal(signal.SIGTERM, _terminate)
    try:
        settings = LotSettings(lot_id=lot_id, operator=operator, mode=mode)
        with LotProgress(console, expected_parts, lot_id) as progress:
            runner = LotRunner(plan, bench, writer, settings, on_part=progress.update)
            tally = runner.run()
        if after is not None:
            after(out)
        _close_datalog(out, stdf, console)
    finally:
        signal.signal(signal.SIGTERM, previous)
        bench.close()
    for table in bin_summary(tally, plan.table):
        console.print(table)
    console.print(lot_line(tally))
    console.print(f"datalog: {out}")
    if tally.stopped_because:
        console.print(f"[bold red]lot stopped:[/] {tally.stopped_because}; bench in safe state")
        return EXIT_STOPPED
    return 0


def _close_datalog(out: Path, stdf: bool, console: Console) -> None:
    """End-of-lot files: the binary STDF if asked, then the manifest over everything."""
    from station.manifest import write_manifest
    from station.stdf_export import write_stdf

    if stdf:
        console.print(f"STDF V4: {write_stdf(out)}")
    write_manifest(out)


@main.command("dry-run")
@click.option("--parts", type=click.IntRange(1, 100000), default=32, show_default=True, help="Parts in the simulated lot.")
@click.option("--sites", type=click.IntRange(1, 4), default=4, show_default=True, help="Sites per handler index.")
@click.option("--seed", type=int, default=1, show_default=True, help="Seed of the simulated population.")
@click.option("--out", type=click.Path(path_type=Path), default=None, help="Datalog folder [default: datalogs/<lot>].")
@click.option("--lot", "lot_id", default=None, help="Lot id [default: DEMO-<date>-<time>].")
@click.option("--operator", default="demo", show_default=True)
@click.option("--bench", "bench_path", type=click.Path(path_type=Path), default=None,
              help="Bench config whose fixture and safety limits the simulated bench takes.")
@click.option("--sequence", "sequence_path", type=click.Path(path_type=Path), default=DEMO_SEQUENCE,
              help="Sequence file [default: the demo product's].")
@click.option("--limits", "limits_path", type=click.Path(path_type=Path), default=DEMO_LIMITS,
              help="Limit table [default: the demo product's].")
@click.option("--speed", type=click.FloatRange(0.1, 1000), default=1.0, show_default=True,
              help="Simulated time per wall time; above 1 runs the physics faster than real (for tests).")
@click.option("--force", is_flag=True, help="Overwrite an existing datalog folder.")
@click.option("--stdf", is_flag=True, help="Also write the lot as binary STDF V4 (lot.stdf).")
def dry_run(parts: int, sites: int, seed: int, out: Path | None, lot_id: str | None, operator: str,
            bench_path: Path | None, sequence_path: Path, limits_path: Path, speed: float, force: bool,
            stdf: bool) -> None:
    """Run the screening sequence against the simulated bench (SCPI on loopback, through pyvisa-py)."""
    from sim_instruments.bench import SimBench, SimSettings

    console = Console()
    lot_id = lot_id or time.strftime("DEMO-%Y%m%d-%H%M%S")
    out = out or Path("datalogs") / lot_id
    settings = SimSettings(seed=seed, sites=sites, parts=parts, speed=speed)
    user_bench = _read_bench_overrides(bench_path, settings) if bench_path else None
    with SimBench(settings) as sim, tempfile.TemporaryDirectory() as temp:
        sim.start()
        config = yaml.safe_load(sim.bench_config_text())
        if user_bench:
            config.update({k: user_bench[k] for k in ("station", "fixture", "safety") if k in user_bench})
        bench_file = Path(temp) / "bench.yaml"
        header = "# Bench config of the simulated bench for this dry run (written by the station).\n"
        bench_file.write_text(header + yaml.safe_dump(config, sort_keys=False), encoding="utf-8")
        console.print(f"dry run: simulated bench on loopback, seed {seed}, {parts} parts, {sites} site(s)")
        code = _run_lot(bench_file, sequence_path, limits_path, out, lot_id, operator, "dry-run", force,
                        console, parts, after=lambda folder: sim.write_truth(folder / "sim_truth.csv"),
                        stdf=stdf)
    sys.exit(code)


def _read_bench_overrides(path: Path, settings) -> dict:
    from station.bench_config import load_bench_config

    try:
        config = load_bench_config(path)
    except ConfigError as exc:
        raise Refused(str(exc)) from None
    settings.sites = config.sites
    settings.rf_ohm, settings.rs_ohm = config.rf_ohm, config.rs_ohm
    settings.dmm_per_site = config.dmm_per_site
    return yaml.safe_load(path.read_text(encoding="utf-8"))


@main.command("run")
@click.option("--bench", "bench_path", type=click.Path(path_type=Path), required=True, help="Bench config (YAML).")
@click.option("--sequence", "sequence_path", type=click.Path(path_type=Path), required=True, help="Sequence (YAML).")
@click.option("--limits", "limits_path", type=click.Path(path_type=Path), required=True, help="Limit table (YAML).")
@click.option("--lot", "lot_id", required=True, help="Lot id.")
@click.option("--operator", default="", help="Operator name for the datalog.")
@click.option("--out", type=click.Path(path_type=Path), required=True, help="Datalog folder.")
@click.option("--parts", "expected_parts", type=click.IntRange(1), default=None, help="Expected lot size, for the progress bar.")
@click.option("--force", is_flag=True, help="Overwrite an existing datalog folder.")
@click.option("--stdf", is_flag=True, help="Also write the lot as binary STDF V4 (lot.stdf).")
def run(bench_path: Path, sequence_path: Path, limits_path: Path, lot_id: str, operator: str, out: Path,
        expected_parts: int | None, force: bool, stdf: bool) -> None:
    """Screen a lot on a bench (real instruments, or `station sim serve` in another terminal)."""
    if not lot_id.strip():
        raise Refused("--lot must not be empty")
    sys.exit(_run_lot(bench_path, sequence_path, limits_path, out, lot_id.strip(), operator, "run", force,
                      Console(), expected_parts, stdf=stdf))


@main.group("sim")
def sim_group() -> None:
    """The simulated bench."""


@sim_group.command("serve")
@click.option("--seed", type=int, default=1, show_default=True)
@click.option("--sites", type=click.IntRange(1, 4), default=4, show_default=True)
@click.option("--parts", type=click.IntRange(1, 1000000), default=32, show_default=True)
@click.option("--write-bench", type=click.Path(path_type=Path), default=None, help="Write a bench config for it here.")
@click.option("--truth", type=click.Path(path_type=Path), default=None, help="Write sim_truth.csv here on exit.")
@click.option("--host", default="127.0.0.1", show_default=True, help="Address to listen on (loopback unless given).")
@click.option("--port", "base_port", type=click.IntRange(0, 65535), default=0, help="First port (0: any free ports).")
@click.option("--speed", type=click.FloatRange(0.1, 1000), default=1.0, show_default=True)
@click.option("--single-dmm", is_flag=True, help="One DMM behind the scanner instead of one per site.")
@click.option("--fault", "faults", multiple=True, metavar="ROLE:KIND=VALUE",
              help="Inject a fault, e.g. dmm1:latency=0.05, force:drop=100 (repeatable).")
def sim_serve(seed: int, sites: int, parts: int, write_bench: Path | None, truth: Path | None, host: str,
              base_port: int, speed: float, single_dmm: bool, faults: tuple[str, ...]) -> None:
    """Serve the simulated bench on loopback until interrupted; prints ROLE RESOURCE per instrument."""
    from sim_instruments.bench import SimSettings
    from sim_instruments.serve import parse_fault_option, serve_until_interrupted

    settings = SimSettings(seed=seed, sites=sites, parts=parts, host=host, base_port=base_port, speed=speed,
                           dmm_per_site=not single_dmm)
    parsed = []
    for text in faults:
        try:
            parsed.append(parse_fault_option(text))
        except ValueError as exc:
            raise Refused(f"--fault {text}: {exc}") from None
    serve_until_interrupted(settings, write_bench=write_bench, echo=click.echo, truth_path=truth,
                            faults=parsed)


def _register_datalog_tools() -> None:
    """Commands that read datalogs only: convert and verify, summary, rebin, limits."""
    from station.cli_datalog import convert_command, verify_command
    from station.cli_review import limits_group, rebin_command, summary_command

    for command in (convert_command, verify_command, summary_command, rebin_command, limits_group):
        main.add_command(command)


_register_datalog_tools()

if __name__ == "__main__":
    main()

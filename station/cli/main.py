"""The `station` command: screen lots on a bench, dry-run them on the simulated bench, review them.

Exit codes scripts can rely on (station/errors.py, docs/exit-codes.md): 0 done; 2 refused
input (a bad file, option or folder: nothing was powered and nothing written); 3 the lot was
stopped (instrument failure, Ctrl-C, SIGTERM: the bench was put in its safe state and the
datalog holds every finished part); 1 the station itself failed (a bug, a full disk): also
after the safe state, with one line saying why. Every StationError that leaves a command is
turned into its one line and exit code here, in StationGroup.
"""

from __future__ import annotations

import sys
import tempfile
import time
from collections.abc import Callable
from dataclasses import dataclass, field
from functools import partial
from pathlib import Path
from typing import Any

import click
import yaml
from rich.console import Console

from drivers.errors import InstrumentError, RequestRefused
from station import __version__
from station.cli.bench_commands import bench_group
from station.cli.view_commands import view_option
from station.config.files import ConfigError
from station.datalog.folder import SAFE_NAME_CHARS, is_safe_folder_name
from station.datalog.resume import ResumeState
from station.datalog.writer import DatalogWriter
from station.demo import DEMO_LIMITS, DEMO_SEQUENCE
from station.errors import (
    EXIT_OK,
    EXIT_SOFTWARE,
    EXIT_STOPPED,
    Refused,
    StationError,
    as_click_error,
    one_line,
)
from station.lot.stop_signals import LotInterrupted, StopRequests, signals_deferred, stop_requests

DEFAULT_MAX_FAULTS = 3


class StationGroup(click.Group):
    """Every error comes out as one line with the exit code of station/errors.py, never a trace:
    a StationError with its own code (refused input 2, stopped 3), anything else 1."""

    def invoke(self, ctx: click.Context):
        try:
            return super().invoke(ctx)
        except (click.exceptions.Exit, click.ClickException, click.Abort, SystemExit):
            raise
        except KeyboardInterrupt:
            click.echo("stopped by Ctrl-C", err=True)
            sys.exit(EXIT_STOPPED)
        except LotInterrupted as exc:
            click.echo(one_line(str(exc)), err=True)
            sys.exit(EXIT_STOPPED)
        except StationError as exc:
            raise as_click_error(exc) from None
        except Exception as exc:
            click.echo(one_line(f"station error: {type(exc).__name__}: {exc}"), err=True)
            sys.exit(EXIT_SOFTWARE)


@click.group(cls=StationGroup, context_settings={"help_option_names": ["-h", "--help"]})
@click.version_option(__version__, prog_name="station")
def main() -> None:
    """Screen precision op-amps on a bench of SCPI instruments, or dry-run on the simulated bench."""


@dataclass(frozen=True)
class LotJob:
    """One lot to run: the files, where it is logged, and how it stops."""

    bench_path: Path
    sequence_path: Path
    limits_path: Path
    out: Path
    lot_id: str
    operator: str
    mode: str
    force: bool = False
    expected_parts: int | None = None
    stdf: bool = False
    resume: ResumeState | None = None
    max_faults: int = DEFAULT_MAX_FAULTS
    extra_header: dict = field(default_factory=dict)
    # Manual socket: told of every seat the operator confirms (the simulated bench seats a part).
    seated: Callable[[int, str | None], None] | None = None
    pat_baseline: Path | None = None   # dynamic PAT limits from this earlier lot
    view: Any = None               # a ViewAddress: serve the live page (station/cli/view_commands.py)
    store: str | None = None        # --store URL: the live sink publishes each part (never in lot.json)
    # A dry run's sim speed (model seconds per wall second): the station's own waits are divided
    # by it, so a fast dry run sees the settling of a slow one, only sooner. 1 on a real bench.
    wait_scale: float = 1.0


def _run_lot(job: LotJob, console: Console, write_truth: Callable[[Path], None] | None = None) -> int:
    """Plan, open the bench, run the lot with progress, print the summary. Returns the exit code.

    SIGTERM stops the lot the way Ctrl-C does; both, and any error, end in the safe state."""
    with stop_requests(lambda text: _say(console, text, "yellow")) as stops:
        try:
            return _plan_and_run(job, console, write_truth, stops)
        except (LotInterrupted, KeyboardInterrupt) as exc:
            # Before the lot loop (opening the bench): nothing was powered yet.
            _say(console, f"stopped before the lot started: {exc or 'Ctrl-C'}", "bold red")
            return EXIT_STOPPED


def _plan_and_run(job: LotJob, console: Console, write_truth: Callable[[Path], None] | None,
                  stops: StopRequests) -> int:
    from station.cli.lot_console import LotProgress, bin_summary, lot_line
    from station.cli.pause_prompt import ask_pause
    from station.cli.screen_commands import pat_preset
    from station.cli.view_commands import live_view
    from station.config.plan import build_plan
    from station.lot.bench import open_bench
    from station.lot.runner import LotRunner, LotSettings, scaled_sleep

    live: list[LotProgress] = []   # the progress bar, once it runs: paused at every prompt

    plan = build_plan(job.bench_path, job.sequence_path, job.limits_path)   # refused: ConfigError
    if job.resume is not None and plan.bench.handshake is not None:
        # A handshake carries no part ids: numbering them again would repeat the lot's ids.
        raise Refused(f"{job.bench_path}: a lot on a handler wired through digital I/O (dio-handshake) "
                      "cannot be resumed yet; start a new lot for the parts not yet sorted")
    writer = DatalogWriter(job.out, force=job.force, resume=job.resume)      # refused: DatalogError
    try:
        bench = open_bench(plan.bench, ask=lambda text: _ask_operator(text, live), seated=job.seated)
    except (InstrumentError, RequestRefused) as exc:
        raise click.ClickException(f"cannot open the bench: {exc}") from None
    if job.resume is not None:
        _tell_resume(job.resume, console)
    sink = None
    try:
        settings = LotSettings(lot_id=job.lot_id, operator=job.operator, mode=job.mode,
                               max_faults=job.max_faults, extra_header=job.extra_header,
                               pat_preset=pat_preset(plan.table, job.pat_baseline))
        with live_view(job.view, job.out, job.expected_parts, partial(_say_whole, console)) as page, \
                LotProgress(console, job.expected_parts, job.lot_id) as progress:
            live.append(progress)

            def on_part(record, tally) -> None:
                progress.update(record, tally)
                page.poke()

            if job.store is not None:
                from station.store.live import LiveSink

                sink = LiveSink(job.store, job.out, lambda text: _say(console, text, "yellow")).start()
                on_part = _both(on_part, sink.part_logged)
            runner = LotRunner(plan, bench, writer, settings, on_part=on_part,
                               resume=job.resume, tell=lambda text: _say(console, text, "yellow"),
                               way_out=page.way_out(stops.way_out),
                               decide=lambda alarm, pause: ask_pause(alarm, pause, live, page.desk),
                               sleep=scaled_sleep(job.wait_scale))
            tally = runner.run()
        with signals_deferred():       # the end-of-lot files are written whole, in order
            if tally.stop_code != EXIT_SOFTWARE:
                _seal(job.out, job.stdf, write_truth, console)
    finally:
        bench.close()
        if sink is not None:           # after the safe state and the seal: lot.json is final
            _say(console, sink.close())
    for table in bin_summary(tally, plan.table):
        console.print(table)
    console.print(lot_line(tally))
    _say(console, "safe state: " + "; ".join(runner.safe_state_log))
    for warning in bench.unverified or []:
        _say(console, f"WARNING: {warning}", "bold red")
    safe_words = "bench in safe state" if bench.is_safe else "bench NOT confirmed safe (see WARNING above)"
    _say(console, f"datalog: {job.out}")
    if tally.stopped_because:
        _say(console, f"lot stopped: {tally.stopped_because}; {safe_words}", "bold red")
        _say(console, f"resume it with: station {job.mode} --resume {job.out} ...")
        return tally.stop_code or EXIT_STOPPED
    if not bench.is_safe:
        _say(console, f"lot complete, but {safe_words}", "bold red")
        return EXIT_STOPPED
    return EXIT_OK


def _both(first: Callable, second: Callable) -> Callable:
    def call(*args: object) -> None:
        first(*args)
        second(*args)

    return call


def _ask_operator(text: str, live: list) -> str:
    from station.lot.bench import ask_operator

    if live:
        return str(live[0].ask(lambda: ask_operator(text)))
    return ask_operator(text)


def _say(console: Console, text: str, style: str | None = None) -> None:
    """Print text that may hold instrument replies and SCPI commands: no markup, no emoji
    (rich would turn ':ZERO:' into an emoji and '[...]' into styles)."""
    console.print(text, style=style, markup=False, emoji=False, highlight=False)


def _say_whole(console: Console, text: str) -> None:
    """A line never wrapped (an address to copy)."""
    console.print(text, markup=False, emoji=False, highlight=False, soft_wrap=True)


def _tell_resume(state: ResumeState, console: Console) -> None:
    for warning in state.warnings:
        _say(console, f"resume: {warning}", "yellow")
    done = len(state.done_ids)
    _say(console, f"resuming lot {state.header.get('lot_id')}: {done} part(s) already logged"
                  + (f"; retesting {', '.join(state.interrupted)}" if state.interrupted else ""))


def _seal(out: Path, stdf: bool, write_truth: Callable[[Path], None] | None, console: Console) -> None:
    """The end-of-lot files after lot.json, in order, the manifest (the seal) last: a kill
    part-way is finished by `--resume` (station/datalog/seal.py)."""
    from station.datalog.seal import seal_datalog

    written = seal_datalog(out, stdf=stdf, write_truth=write_truth)
    if "lot.stdf" in written:
        console.print(f"STDF V4: {out / 'lot.stdf'}")


def _seal_ended_lot(state: ResumeState, stdf: bool, write_truth: Callable[[Path], None] | None) -> int:
    """--resume of a lot that reached its end but was killed before its seal: finish the seal,
    test nothing, power nothing."""
    console = Console()
    _tell_resume(state, console)
    _say(console, f"lot {state.header.get('lot_id')} reached its end but its datalog was not sealed "
                  "(stopped during the lot end): sealing it; nothing is tested")
    _seal(state.folder, stdf, write_truth, console)
    _say(console, f"datalog: {state.folder} (sealed)")
    return EXIT_OK


def _inspect_resume(folder: Path, out: Path | None, force: bool, mode: str, sequence: Path, limits: Path,
                    lot_id: str | None) -> ResumeState:
    """What the interrupted lot in `folder` holds; refuses options that contradict a resume."""
    from station.datalog.resume import inspect_resume

    if out is not None and Path(out) != Path(folder):
        raise Refused("--resume continues the lot in its own folder: leave out --out")
    if force:
        raise Refused("--resume and --force do not go together: --force starts a new lot")
    return inspect_resume(folder, mode=mode, sequence=sequence, limits=limits, lot_id=lot_id)


def _lot_id(value: str | None, option: str = "--lot") -> str | None:
    if value is None:
        return None
    if not value.strip():
        raise Refused(f"{option} must not be empty (give the lot id, e.g. --lot LOT-0042)")
    if "," in value or not value.isprintable():
        raise Refused(f"{option} {value!r}: a lot id cannot hold commas, line breaks or control characters")
    return value.strip()


def _operator(value: str) -> str:
    if not value.isprintable():
        raise Refused(f"--operator {value!r}: an operator name cannot hold line breaks or control characters")
    return value.strip()


def _store_url(url: str | None) -> None:
    """A --store that is not a PostgreSQL URL is refused before anything is powered."""
    if url is not None:
        from station.store.connect import shown

        shown(url)


def _default_out(lot_id: str) -> Path:
    """datalogs/<lot id>, only for a lot id that is a plain folder name (never a path)."""
    if not is_safe_folder_name(lot_id):
        raise Refused(f"--lot {lot_id!r}: cannot name the datalog folder datalogs/<lot id>: a lot id used "
                      f"as a folder name may hold {SAFE_NAME_CHARS} (or give --out DIR)")
    return Path("datalogs") / lot_id


_MAX_FAULTS = click.option(
    "--max-faults", type=click.IntRange(1, 1000), default=DEFAULT_MAX_FAULTS, show_default=True,
    help="Faulted attempts in a row (instrument failures) before the lot stops.")
_STORE = click.option(
    "--store", "store_url", default=None,
    help="Also publish each part to this fleet store (PostgreSQL URL), from a background worker; "
         "the lot never waits for it.")
# Options that more than one command takes, written once.
_PAT_BASELINE = click.option(
    "--pat-baseline", type=click.Path(path_type=Path), default=None,
    help="Dynamic PAT limits from this earlier lot's datalog instead of this lot's first parts.")
_FIXTURE_FAULT = click.option(
    "--fixture-fault", "fixture_faults", multiple=True, metavar="KIND:SITE@PART[:STEP]",
    help="Break the simulated fixture mid-lot: contact:2@40 (site 2 loses contact from part 40), "
         "leakage:3@100:5uA (site 3 leaks 5 uA more per part from part 100). Repeatable.")
_RESUME = click.option(
    "--resume", "resume_dir", type=click.Path(path_type=Path), default=None,
    help="Continue the interrupted lot logged in this folder (parts logged are not tested again).")

# SimSettings fields a resumed dry run takes from lot.json, so it simulates the same lot.
_SIM_KEYS = ("seed", "parts", "sites", "rf_ohm", "rs_ohm", "line_hz", "dmm_per_site")


@main.command("dry-run")
@click.option("--parts", type=click.IntRange(1, 100000), default=32, show_default=True, help="Parts in the simulated lot.")
@click.option("--sites", type=click.IntRange(1, 4), default=4, show_default=True, help="Sites per handler index.")
@click.option("--manual", is_flag=True,
              help="No handler: the operator seats each part and types its id at the prompt (manual socket).")
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
              help="Simulated time per wall time; above 1 runs the physics, and the station's waits, "
                   "faster than real (for tests).")
@click.option("--force", is_flag=True, help="Overwrite an existing datalog folder.")
@click.option("--stdf", is_flag=True, help="Also write the lot as binary STDF V4 (lot.stdf).")
@click.option("--inject-outliers", "outlier_share", type=click.FloatRange(0.0, 0.2), default=0.0,
              help="Share of the simulated parts given an offset inside the limits but far from the "
                   "population (invented outliers, for outlier screening).")
@_PAT_BASELINE
@_FIXTURE_FAULT
@click.option("--transport", "transports", multiple=True, metavar="[ROLE=]socket|hislip|vxi11",
              help="How the simulated instruments are served: raw SCPI sockets (default), HiSLIP, or VXI-11 "
                   "without the portmapper (pyvisa-py only); ROLE=... for one instrument (repeatable).")
@click.option("--handler", "handler_interface", type=click.Choice(["scpi", "dio"]), default="scpi",
              show_default=True,
              help="The simulated handler takes HANDler commands (scpi) or is wired through a digital I/O "
                   "instrument's lines (dio, driver dio-handshake).")
@_RESUME
@_MAX_FAULTS
@view_option
@_STORE
@click.pass_context
def dry_run(ctx: click.Context, parts: int, sites: int, manual: bool, seed: int, out: Path | None, lot_id: str | None,
            operator: str, bench_path: Path | None, sequence_path: Path, limits_path: Path, speed: float,
            force: bool, stdf: bool, transports: tuple[str, ...], handler_interface: str,
            fixture_faults: tuple[str, ...], outlier_share: float, pat_baseline: Path | None,
            resume_dir: Path | None, max_faults: int, view: Any, store_url: str | None) -> None:
    """Run the screening sequence against the simulated bench (SCPI on loopback, through pyvisa-py)."""
    from sim_instruments.bench import SimBench, SimSettings

    console = Console()
    lot_id = _lot_id(lot_id)
    operator = _operator(operator)
    _store_url(store_url)
    if lot_id is not None and out is None and resume_dir is None:
        _default_out(lot_id)          # refused before anything starts
    from station.cli.screen_commands import fixture_fault_options

    settings = SimSettings(seed=seed, sites=sites, parts=parts, speed=speed, handler_interface=handler_interface,
                           fixture_faults=fixture_fault_options(fixture_faults), pat_outlier_share=outlier_share)
    _transports(settings, transports)
    if handler_interface == "dio" and (manual or resume_dir is not None):
        # A handshake carries no part ids: numbering them again after a resume would repeat ids.
        raise Refused("--handler dio: not with --manual or --resume (the handshake carries no part ids)")
    user_bench = _read_bench_overrides(bench_path, settings) if bench_path else None
    resume = None
    if resume_dir is not None:
        resume = _inspect_resume(resume_dir, out, force, "dry-run", sequence_path, limits_path, lot_id)
        _resumed_sim_settings(ctx, resume, settings)
        if resume.ended:
            sys.exit(_seal_ended_lot(resume, stdf, SimBench(settings).write_truth))
        user_bench = _bench_copy(resume_dir)
        instruments = (user_bench or {}).get("instruments") or {}
        settings.generator = settings.generator or (isinstance(instruments, dict) and "generator" in instruments)
        out, lot_id = Path(resume_dir), str(resume.header["lot_id"])
    lot_id = lot_id or time.strftime("DEMO-%Y%m%d-%H%M%S")
    out = out or _default_out(lot_id)
    extra = {"dry_run": {key: getattr(settings, key) for key in _SIM_KEYS}}
    if settings.fixture_faults:
        extra["dry_run"]["fixture_faults"] = [f.text() for f in settings.fixture_faults]
    if settings.pat_outlier_share:
        extra["dry_run"]["pat_outlier_share"] = settings.pat_outlier_share
    try:
        simulated = SimBench(settings)
    except ValueError as exc:          # e.g. --transport for a role this bench does not have
        raise Refused(f"simulated bench: {exc}") from None
    fixture_truth = simulated.fixture_truth()
    if fixture_truth is not None:      # the difference amplifier as drawn: the truth of its mismatch
        extra["dry_run"]["fixture"] = fixture_truth
    with simulated as sim, tempfile.TemporaryDirectory() as temp:
        config = yaml.safe_load(sim.bench_config_text())
        if user_bench:
            config.update({k: user_bench[k] for k in ("station", "fixture", "safety") if k in user_bench})
        seat = _SimulatedSocket(sim.resources["handler"]) if manual else None
        if seat is not None:
            del config["instruments"]["handler"]
        bench_file = Path(temp) / "bench.yaml"
        header = "# Bench config of the simulated bench for this dry run (written by the station).\n"
        bench_file.write_text(header + yaml.safe_dump(config, sort_keys=False), encoding="utf-8")
        console.print(f"dry run: simulated bench on loopback, seed {settings.seed}, {settings.parts} parts, "
                      f"{settings.sites} site(s)" + (f", resumed after {settings.skip_parts} part(s)" if resume else ""))
        job = LotJob(bench_file, sequence_path, limits_path, out, lot_id, operator, "dry-run", force,
                     settings.parts, stdf, resume, max_faults, extra, seated=seat, pat_baseline=pat_baseline,
                     view=view, store=store_url, wait_scale=settings.speed)
        try:
            code = _run_lot(job, console, write_truth=sim.write_truth)
        finally:
            if seat is not None:
                seat.close()
    sys.exit(code)


class _SimulatedSocket:
    """A manual socket on the simulated bench: each seat the operator confirms puts the next
    part of the simulated lot in that site (the simulator refuses it while the site is powered)."""

    def __init__(self, resource: str) -> None:
        from drivers.scpi_link import ScpiLink

        self.link = ScpiLink("simulated socket", resource)

    def __call__(self, site: int, part_id: str | None) -> None:
        self.link.open()
        self.link.write_and_wait(f'SIM:SEAT {site},"{part_id or "-"}"')
        self.link.check_errors()

    def close(self) -> None:
        self.link.close()


def _transports(settings, texts: tuple[str, ...]) -> None:
    from sim_instruments.serve import apply_transport_options

    try:
        apply_transport_options(settings, texts)
    except ValueError as exc:
        raise Refused(f"--transport: {exc}") from None


def _resumed_sim_settings(ctx: click.Context, resume: ResumeState, settings) -> None:
    """The simulated lot of the folder, its handler starting after the parts already sorted."""
    if "study" in resume.header:
        raise Refused(f"{resume.folder}: a repeatability study is not resumed (its plan starts over): "
                      "run `station study run` again with --force")
    recorded = resume.header.get("dry_run")
    if not isinstance(recorded, dict) or any(key not in recorded for key in _SIM_KEYS):
        raise Refused(f"{resume.folder}/lot.json: no record of the simulated lot (dry_run); "
                      "this dry run cannot be resumed")
    for key in ("seed", "parts", "sites"):
        given = ctx.get_parameter_source(key) is not click.core.ParameterSource.DEFAULT
        if given and getattr(settings, key) != recorded[key]:
            raise Refused(f"--{key} {getattr(settings, key)}: the lot in {resume.folder} was simulated with "
                          f"--{key} {recorded[key]}; leave it out when resuming")
    for key in _SIM_KEYS:
        setattr(settings, key, recorded[key])
    settings.pat_outlier_share = float(recorded.get("pat_outlier_share", 0.0))   # the same population
    fixture = recorded.get("fixture")
    if isinstance(fixture, dict):                                             # the same fixture
        settings.fixture_kind = tuple(fixture["kinds"])
        settings.diff_gain, settings.diff_tolerance = float(fixture["gain"]), float(fixture["tolerance"])
    settings.skip_parts = resume.presented_before


def _bench_copy(folder: Path) -> dict | None:
    try:
        data = yaml.safe_load((Path(folder) / "bench.yaml").read_text(encoding="utf-8"))
    except (OSError, yaml.YAMLError):
        return None
    return data if isinstance(data, dict) else None


def _read_bench_overrides(path: Path, settings) -> dict:
    from station.config.bench_config import load_bench_config

    try:
        config = load_bench_config(path)
    except ConfigError as exc:
        raise Refused(str(exc)) from None
    settings.sites = config.sites
    if config.rf_ohm > 0:            # a bench without a servo loop keeps the simulator's own
        settings.rf_ohm, settings.rs_ohm = config.rf_ohm, config.rs_ohm
    if config.bias is not None:
        settings.rb_ohm = config.bias.rb_ohm
    settings.dmm_per_site = config.dmm_per_site
    settings.fixture_kind = config.fixture_kinds or "servo_loop"
    settings.generator = config.has_generator     # the simulated bench starts one where the config names it
    if config.diff_amp is not None:
        settings.diff_gain, settings.diff_tolerance = config.diff_amp.gain, config.diff_amp.tolerance
    return yaml.safe_load(path.read_text(encoding="utf-8"))


@main.command("run")
@click.option("--bench", "bench_path", type=click.Path(path_type=Path), required=True, help="Bench config (YAML).")
@click.option("--sequence", "sequence_path", type=click.Path(path_type=Path), required=True, help="Sequence (YAML).")
@click.option("--limits", "limits_path", type=click.Path(path_type=Path), required=True, help="Limit table (YAML).")
@click.option("--lot", "lot_id", default=None, help="Lot id (required unless --resume).")
@click.option("--operator", default="", help="Operator name for the datalog.")
@click.option("--out", type=click.Path(path_type=Path), default=None, help="Datalog folder (required unless --resume).")
@click.option("--parts", "expected_parts", type=click.IntRange(1), default=None, help="Expected lot size, for the progress bar.")
@click.option("--force", is_flag=True, help="Overwrite an existing datalog folder.")
@click.option("--stdf", is_flag=True, help="Also write the lot as binary STDF V4 (lot.stdf).")
@_PAT_BASELINE
@_RESUME
@_MAX_FAULTS
@click.option("--correlation", "correlation_dir", type=click.Path(path_type=Path), default=None,
              help="Start only if this `station correlate` folder passed for this station (recorded in lot.json).")
@view_option
@_STORE
def run(bench_path: Path, sequence_path: Path, limits_path: Path, lot_id: str | None, operator: str,
        out: Path | None, expected_parts: int | None, force: bool, stdf: bool, resume_dir: Path | None,
        max_faults: int, correlation_dir: Path | None, pat_baseline: Path | None, view: Any,
        store_url: str | None) -> None:
    """Screen a lot on a bench (real instruments, or `station sim serve` in another terminal).

    Before wiring real instruments, read the Safety section of the README: outputs are live
    while a lot runs; use the fixture's interlock and your site's ESD and electrical-safety
    rules. The station never exceeds the bench config's safety limits and turns every output
    off on every way out, but it is no substitute for hardware interlocks or fuses."""
    lot_id = _lot_id(lot_id)
    operator = _operator(operator)
    _store_url(store_url)
    resume = None
    if resume_dir is not None:
        resume = _inspect_resume(resume_dir, out, force, "run", sequence_path, limits_path, lot_id)
        if resume.ended:
            sys.exit(_seal_ended_lot(resume, stdf, None))
        out, lot_id = Path(resume_dir), str(resume.header["lot_id"])
        operator = operator or str(resume.header.get("operator", ""))
    if lot_id is None:
        raise Refused("--lot is required (the lot id), unless --resume continues a lot")
    if out is None:
        raise Refused("--out is required (the datalog folder), unless --resume continues a lot")
    extra = {}
    if correlation_dir is not None:     # refused (exit 2) before anything is powered
        from station.config.bench_config import load_bench_config
        from station.qualify.correlation import correlation_gate

        extra["correlation"] = correlation_gate(correlation_dir, load_bench_config(bench_path).station, time.time())
    job = LotJob(bench_path, sequence_path, limits_path, out, lot_id, operator, "run", force, expected_parts,
                 stdf, resume, max_faults, extra, pat_baseline=pat_baseline, view=view, store=store_url)
    sys.exit(_run_lot(job, Console()))


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
@click.option("--bench-errors", "bench_seed", type=int, default=None,
              help="Give the bench its own errors (site offset, DMM gain, leakage) from this seed; "
                   "with --truth they are written to <truth>.bench.json.")
@_FIXTURE_FAULT
@click.option("--transport", "transports", multiple=True, metavar="[ROLE=]socket|hislip|vxi11",
              help="How the simulated instruments are served: raw SCPI sockets (default), HiSLIP, or VXI-11 "
                   "without the portmapper (pyvisa-py only); ROLE=... for one instrument (repeatable).")
@click.option("--dialect", default="", metavar="number=...,overload=...,bool=...,error=...",
              help="Reply forms of every instrument, e.g. number=plain,bool=word (docs/bench-commands.md).")
@click.option("--handler", "handler_interface", type=click.Choice(["scpi", "dio"]), default="scpi",
              show_default=True,
              help="The simulated handler takes HANDler commands (scpi) or is wired through a digital I/O "
                   "instrument's lines (dio, driver dio-handshake).")
def sim_serve(seed: int, sites: int, parts: int, write_bench: Path | None, truth: Path | None, host: str,
              base_port: int, speed: float, single_dmm: bool, faults: tuple[str, ...],
              transports: tuple[str, ...], dialect: str, handler_interface: str, bench_seed: int | None,
              fixture_faults: tuple[str, ...]) -> None:
    """Serve the simulated bench on loopback until interrupted; prints ROLE RESOURCE per instrument."""
    from sim_instruments.bench import SimSettings
    from sim_instruments.bench_errors import BenchErrorSpec
    from sim_instruments.serve import parse_fault_option, serve_until_interrupted
    from station.cli.screen_commands import fixture_fault_options

    settings = SimSettings(seed=seed, sites=sites, parts=parts, host=host, base_port=base_port, speed=speed,
                           dmm_per_site=not single_dmm, dialect=dialect, handler_interface=handler_interface,
                           bench_errors=BenchErrorSpec(seed=bench_seed) if bench_seed is not None else None,
                           fixture_faults=fixture_fault_options(fixture_faults))
    _transports(settings, transports)
    parsed = []
    for text in faults:
        try:
            parsed.append(parse_fault_option(text))
        except ValueError as exc:
            raise Refused(f"--fault {text}: {exc}") from None
    try:
        serve_until_interrupted(settings, write_bench=write_bench, echo=click.echo, truth_path=truth,
                                faults=parsed)
    except ValueError as exc:          # a --fault or --transport for a role the bench lacks
        raise Refused(f"simulated bench: {exc}") from None


def _register_datalog_tools() -> None:
    """Commands that read datalogs only: convert and verify, summary, rebin, limits."""
    from station.cli.datalog_commands import convert_command, verify_command
    from station.cli.review_commands import limits_group, rebin_command, summary_command
    from station.cli.view_commands import view_command

    for command in (convert_command, verify_command, summary_command, rebin_command, limits_group,
                    view_command):
        main.add_command(command)
    from station.cli.qualify_commands import correlate_command  # also adds limits set / guard
    main.add_command(correlate_command)
    from station.cli.study_commands import study_group
    main.add_command(study_group)
    from station.cli import screen_commands

    screen_commands.register(main, limits_group)
    from station.cli.budget_commands import budget_command
    main.add_command(budget_command)


_register_datalog_tools()
main.add_command(bench_group)


def _register_store_tools() -> None:
    """The fleet store (station/store): store init, publish, export."""
    from station.cli.store_commands import export_command, publish_command, store_group

    for command in (store_group, publish_command, export_command):
        main.add_command(command)


_register_store_tools()

if __name__ == "__main__":
    main()

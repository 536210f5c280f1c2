"""`station bench check`: the bench self-test, one line per check (station/lot/bench_check.py)."""

from __future__ import annotations

import sys
from pathlib import Path

import click

from station.config.files import ConfigError
from station.errors import EXIT_CHECK_FAILED, EXIT_OK, Refused

_STYLE = {"PASS": "green", "FAIL": "red", "SKIP": "yellow"}


@click.group("bench")
def bench_group() -> None:
    """The bench itself: check it before a lot."""


@bench_group.command("check")
@click.option("--bench", "bench_path", type=click.Path(path_type=Path), required=True, help="Bench config (YAML).")
def check_command(bench_path: Path) -> None:
    """Identify every instrument and check error queues, *RST defaults, outputs, relays, the DMM
    zero and the supply read-back, within the bench's safety limits. Exit 4 if any check fails."""
    from station.config.bench_config import load_bench_config
    from station.lot.bench_check import FAIL, BenchCheck, CheckResult

    try:
        config = load_bench_config(bench_path)
    except ConfigError as exc:
        raise Refused(str(exc)) from None

    def report(result: CheckResult) -> None:
        click.echo(click.style(result.outcome, fg=_STYLE[result.outcome]) + result.line()[4:])

    click.echo(f"bench check of {config.station} ({bench_path}): run it with no part in the sockets")
    results = BenchCheck(config, report).run()
    failed = [r for r in results if r.outcome == FAIL]
    passed = sum(r.outcome == "PASS" for r in results)
    click.echo(f"{passed} passed, {len(failed)} failed, {len(results) - passed - len(failed)} not run")
    sys.exit(EXIT_CHECK_FAILED if failed else EXIT_OK)

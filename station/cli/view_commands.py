"""The live lot page on the command line: `--view [HOST:]PORT` on `run` and `dry-run`, and
`station view DATALOG`, which serves the same page from a datalog folder alone.

Loopback unless a host is given; on any other address a token is made for this process and
printed here, and the page refuses every request without it. A lot's page also gets a
bench-control token, printed here in a second address: only a page opened from that address
can answer a lot-control pause. No token is ever written to a file.
"""

from __future__ import annotations

import threading
from collections.abc import Callable, Iterator
from contextlib import contextmanager
from dataclasses import dataclass
from pathlib import Path
from typing import TYPE_CHECKING, Any

import click

from station.cli.datalog_commands import one_line_errors
from station.errors import Refused
from station.view.address import ViewAddress, parse_address

if TYPE_CHECKING:               # the web stack and pandas load only when a page is served
    from station.screen.pause_desk import PauseDesk
    from station.view.hub import SnapshotHub
    from station.view.server import PageServer
    from station.view.snapshot import Phase

SETTLE_S = 0.5    # at the lot end: time for the last snapshot to reach the open pages


def _address(ctx: click.Context, param: click.Parameter, value: str | None) -> ViewAddress | None:
    if value is None:
        return None
    try:
        return parse_address(value)
    except Refused as exc:
        raise click.BadParameter(str(exc).split(": ", 1)[-1]) from None


view_option = click.option(
    "--view", "view", metavar="[HOST:]PORT", default=None, callback=_address,
    help="Serve the live lot page on this port (loopback; with a HOST other than loopback every "
         "request needs the token printed here). PORT 0 picks a free port.")


@dataclass
class LiveView:
    """What the lot loop tells the page: a part was logged (poke), the way out began (phase);
    and where the page's answer to a lot-control pause arrives (desk)."""

    hub: SnapshotHub | None = None
    phase: Phase | None = None
    desk: PauseDesk | None = None

    def poke(self, *_: Any) -> None:
        if self.hub is not None:
            self.hub.poke()

    def way_out(self, then: Callable[[], None]) -> Callable[[], None]:
        def told() -> None:
            if self.phase is not None:
                self.phase.value = "safe state"
                self.poke()
            then()
        return told


@contextmanager
def live_view(address: ViewAddress | None, folder: Path, expected_parts: int | None,
              echo: Callable[[str], None]) -> Iterator[LiveView]:
    """Serve the page of the lot logged in `folder` while the block runs (nothing without an
    address). At the end the last snapshot is sent to the open pages before the server stops."""
    if address is None:
        yield LiveView()
        return
    from station.screen.pause_desk import PauseDesk
    from station.view.hub import SnapshotHub
    from station.view.server import PageServer
    from station.view.snapshot import LotSnapshots, Phase

    phase = Phase()
    desk = PauseDesk()
    hub = SnapshotHub(LotSnapshots(folder, expected_parts, phase), on_error=echo)
    server = PageServer(hub, address, desk=desk)
    server.start()
    _tell_address(server, echo)
    try:
        yield LiveView(hub, phase, desk)
    finally:
        hub.poke()
        threading.Event().wait(SETTLE_S)
        server.stop()


def _tell_address(server: PageServer, echo: Callable[[str], None]) -> None:
    echo(f"live page: {server.url}")
    if server.token:
        echo("live page: not loopback, so every request needs the token above (keep it to the people "
             "who may watch this lot; it ends with this process)")
    if server.control_token:
        echo(f"live page with bench control (answers a lot-control pause): {server.control_url}")
        echo("live page: keep that address to the operator; the plain address above only watches")


@click.command("view")
@click.argument("datalog", type=click.Path(path_type=Path))
@click.option("--port", type=click.IntRange(0, 65535), default=8765, show_default=True,
              help="Port to serve the page on (0: any free port).")
@click.option("--host", default="127.0.0.1", show_default=True,
              help="Address to listen on; other than loopback, every request needs the printed token.")
@click.option("--parts", "expected_parts", type=click.IntRange(1), default=None,
              help="Expected lot size, for the remaining time (a dry run's lot.json has it).")
@one_line_errors
def view_command(datalog: Path, port: int, host: str, expected_parts: int | None) -> None:
    """Serve the live page of a lot from its datalog folder alone (read-only; follows the
    files as they grow). Stop with Ctrl-C."""
    if not datalog.is_dir():
        raise Refused(f"{datalog}: no such folder (give a datalog folder written with --out)")
    from station.view.hub import SnapshotHub
    from station.view.server import PageServer
    from station.view.snapshot import LotSnapshots

    address = ViewAddress(host, port)
    hub = SnapshotHub(LotSnapshots(datalog, expected_parts), on_error=click.echo)
    server = PageServer(hub, address)
    server.start()
    _tell_address(server, click.echo)
    click.echo("live page: reading the folder only; Ctrl-C stops the page (never the lot)")
    try:
        threading.Event().wait()
    except KeyboardInterrupt:
        pass
    finally:
        server.stop()

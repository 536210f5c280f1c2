"""The lot-control pause at the terminal: the question, the operator's typed answer, and, when
the live page can answer too (a PauseDesk), whichever answers first. The terminal is read
without blocking then, so an answer from the page withdraws the prompt at once."""

from __future__ import annotations

import io
import os
import select
import sys
import termios
from collections.abc import Callable
from typing import Any

import click

from station.screen.pause_desk import PauseDesk

POLL_S = 0.2       # how often the terminal prompt looks whether the page answered


def ask_pause(alarm: Any, pause: dict[str, Any], live: list, desk: PauseDesk | None = None) -> tuple[str, str]:
    """(choice, source) at a lot-control pause (the bench is in its safe state meanwhile)."""
    choices = [str(c) for c in pause["choices"]]
    site = f" (skip: site {alarm.site} is not tested any more)" if "skip" in choices else ""
    text = f"LOT PAUSED ({alarm.rule}): {alarm.message}\nbench in safe state; {', '.join(choices)}{site}?"
    if desk is not None:
        desk.open(str(pause["id"]), tuple(choices))
        text += "\n(or answer on the live page)"

    def question() -> tuple[str, str]:
        fd = _fileno(sys.stdin)
        if desk is None or fd is None:
            return _blocking(text, choices, desk, str(pause["id"]))
        return _first_answer(text, choices, desk, str(pause["id"]), fd)

    if live:
        answer: tuple[str, str] = live[0].ask(question)
        return answer
    return question()


def _blocking(text: str, choices: list[str], desk: PauseDesk | None, pause_id: str) -> tuple[str, str]:
    """The plain prompt (no page, or an input that cannot be polled); Enter or a closed input
    is stop, the safe answer."""
    try:
        choice = str(click.prompt(text, type=click.Choice(choices), default="stop"))
    except click.Abort:          # input closed: the safe answer
        choice = "stop"
    return _terminal_answer(desk, pause_id, choice)


def _first_answer(text: str, choices: list[str], desk: PauseDesk, pause_id: str, fd: int) -> tuple[str, str]:
    """Read the terminal a line at a time while looking whether the page answered first."""
    prompt = f"{text} ({'/'.join(choices)}) [stop]: "
    click.echo(prompt, nl=False)
    pending = b""
    while True:
        won = desk.answered(pause_id)
        if won is not None:
            _drop_typed(fd)
            click.echo("\n" + _withdrawn(won.choice))
            return won.choice, won.source
        ready, _, _ = select.select([fd], [], [], POLL_S)
        if not ready or desk.answered(pause_id) is not None:     # the page first: what was typed is dropped
            continue
        data = os.read(fd, 1024)
        if not data:             # input closed: the safe answer
            click.echo("")
            return _terminal_answer(desk, pause_id, "stop")
        pending += data
        while b"\n" in pending:
            line, pending = pending.split(b"\n", 1)
            choice = line.decode("utf-8", errors="replace").strip() or "stop"
            if choice in choices:
                return _terminal_answer(desk, pause_id, choice)
            click.echo(f"Error: {choice!r} is not one of {', '.join(repr(c) for c in choices)}.")
            click.echo(prompt, nl=False)


def _terminal_answer(desk: PauseDesk | None, pause_id: str, choice: str,
                     echo: Callable[[str], None] = click.echo) -> tuple[str, str]:
    if desk is None:
        return choice, "terminal"
    reply = desk.answer(pause_id, choice, "terminal")
    won = desk.answered(pause_id)
    if not reply.accepted and won is not None:      # the page was first
        echo(_withdrawn(won.choice) + f" (the typed {choice!r} is ignored: {reply.message})")
        return won.choice, won.source
    return choice, "terminal"


def _drop_typed(fd: int) -> None:
    """Half a typed line at a withdrawn prompt must not answer the next one."""
    if os.isatty(fd):
        termios.tcflush(fd, termios.TCIFLUSH)


def _withdrawn(choice: str) -> str:
    return f"answered on the live page: {choice}; the terminal prompt is withdrawn"


def _fileno(stream: Any) -> int | None:
    """The stream's file descriptor if select() can poll it (a terminal or a pipe), else None
    (a test's in-memory input)."""
    try:
        fd = stream.fileno()
    except (AttributeError, OSError, io.UnsupportedOperation):
        return None
    try:
        select.select([fd], [], [], 0)
    except (OSError, ValueError):
        return None
    return int(fd)

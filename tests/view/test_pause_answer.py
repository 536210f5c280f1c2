"""Answering a lot-control pause from the live page: plain HTTP (urllib) against the real
server. The answer needs the bench-control token (none: 401, wrong: 403, and nothing
changes); the first answer wins, from the page or the terminal, and the others are refused
with who answered; the terminal prompt is withdrawn when the page answers. A whole paused dry
run answered from the page: tests/view/test_pause_live_lot.py."""

from __future__ import annotations

import json
import os
import threading
import urllib.error
import urllib.request
from collections.abc import Iterator
from pathlib import Path
from typing import Any

import pytest

from station.cli import pause_prompt
from station.screen.pause_desk import PauseDesk
from station.view.hub import SnapshotHub
from station.view.server import PageServer, ViewAddress
from station.view.snapshot import LotSnapshots
from tests.support.review_datalogs import LotSpec, make_datalog

CHOICES = ("continue", "skip", "stop")


@pytest.fixture(scope="module")
def folder(tmp_path_factory: pytest.TempPathFactory) -> Path:
    return make_datalog(tmp_path_factory.mktemp("pause") / "lot", LotSpec(parts=12))


@pytest.fixture
def served(folder: Path) -> Iterator[tuple[PageServer, PauseDesk]]:
    desk = PauseDesk()
    server = PageServer(SnapshotHub(LotSnapshots(folder), poll_s=0.05), ViewAddress("127.0.0.1", 0), desk=desk)
    server.start()
    try:
        yield server, desk
    finally:
        server.stop()


def post(port: int, body: Any, token: str | None = None, host: str | None = None,
         path: str = "/answer") -> tuple[int, dict[str, Any] | str]:
    headers = {"Content-Type": "application/json"}
    if token is not None:
        headers["X-Control-Token"] = token
    if host is not None:
        headers["Host"] = host
    request = urllib.request.Request(f"http://127.0.0.1:{port}{path}", data=json.dumps(body).encode(),
                                     headers=headers, method="POST")
    try:
        with urllib.request.urlopen(request, timeout=10) as response:
            return response.status, json.loads(response.read())
    except urllib.error.HTTPError as exc:
        text = exc.read().decode()
        try:
            return exc.code, json.loads(text)
        except ValueError:
            return exc.code, text


def test_no_token_or_a_wrong_token_is_refused_and_changes_nothing(served: tuple[PageServer, PauseDesk]) -> None:
    server, desk = served
    desk.open("3", CHOICES)
    status, reply = post(server.port, {"pause": "3", "choice": "continue"})
    assert status == 401 and "token is missing" in reply["message"]
    status, reply = post(server.port, {"pause": "3", "choice": "continue"}, token="not-the-token")
    assert status == 403 and "wrong" in reply["message"]
    # the view's loopback Host check still applies (DNS rebinding), even with the right token
    status, _ = post(server.port, {"pause": "3", "choice": "stop"}, token=server.control_token,
                     host="evil.example:80")
    assert status == 421
    # only /answer takes a POST
    status, _ = post(server.port, {"pause": "3", "choice": "stop"}, token=server.control_token,
                     path="/snapshot.json")
    assert status == 405
    assert desk.open_pause == "3" and desk.answered("3") is None
    # a bad body or a choice this pause does not take changes nothing either
    assert post(server.port, ["continue"], token=server.control_token)[0] == 400
    assert post(server.port, {"pause": "3", "choice": "reboot"}, token=server.control_token)[0] == 400
    assert post(server.port, {"pause": "2", "choice": "stop"}, token=server.control_token)[0] == 409
    assert desk.open_pause == "3" and desk.answered("3") is None
    # the right token answers it
    status, reply = post(server.port, {"pause": "3", "choice": "continue"}, token=server.control_token)
    assert status == 200 and reply["accepted"] is True
    answer = desk.answered("3")
    assert answer is not None and (answer.choice, answer.source) == ("continue", "page")


def test_the_first_of_many_simultaneous_answers_wins(served: tuple[PageServer, PauseDesk]) -> None:
    server, desk = served
    desk.open("5", CHOICES)
    start = threading.Barrier(9)
    replies: list[tuple[int, Any, str]] = []

    def one(choice: str) -> None:
        start.wait()
        status, reply = post(server.port, {"pause": "5", "choice": choice}, token=server.control_token)
        replies.append((status, reply, choice))

    threads = [threading.Thread(target=one, args=(CHOICES[n % 3],)) for n in range(8)]
    for t in threads:
        t.start()
    start.wait()                               # the terminal answers at the same moment
    terminal = pause_prompt._terminal_answer(desk, "5", "stop", echo=lambda text: None)
    for t in threads:
        t.join(timeout=20)
    won = desk.answered("5")
    assert won is not None
    accepted = [r for r in replies if r[0] == 200]
    assert len(replies) == 8
    if won.source == "page":
        assert len(accepted) == 1 and accepted[0][2] == won.choice
    else:
        assert not accepted and won.choice == "stop"
    assert terminal == (won.choice, won.source)    # the terminal goes with the winner either way
    for status, reply, _ in replies:
        if status != 200:
            assert status == 409 and f"answered already, {won.source}: {won.choice}" in reply["message"]
    assert desk.open_pause is None


def test_a_page_answer_after_the_terminal_is_refused_with_the_terminal_answer(
        served: tuple[PageServer, PauseDesk]) -> None:
    server, desk = served
    desk.open("0", ("continue", "stop"))
    assert pause_prompt._terminal_answer(desk, "0", "stop") == ("stop", "terminal")
    status, reply = post(server.port, {"pause": "0", "choice": "continue"}, token=server.control_token)
    assert status == 409 and "terminal: stop" in reply["message"] and reply["accepted"] is False


def test_a_page_served_from_the_folder_alone_cannot_answer(folder: Path) -> None:
    server = PageServer(SnapshotHub(LotSnapshots(folder), poll_s=0.05), ViewAddress("127.0.0.1", 0))
    server.start()
    try:
        assert server.control_token is None and server.control_url is None
        status, reply = post(server.port, {"pause": "0", "choice": "stop"}, token="anything")
        assert status == 404 and "terminal" in reply["message"]
    finally:
        server.stop()


def test_the_terminal_prompt_is_withdrawn_when_the_page_answers(capsys: pytest.CaptureFixture[str]) -> None:
    desk = PauseDesk()
    desk.open("1", CHOICES)
    read, write = os.pipe()
    try:
        threading.Timer(0.3, lambda: desk.answer("1", "skip", "page")).start()
        answer = pause_prompt._first_answer("paused?", list(CHOICES), desk, "1", read)
    finally:
        os.close(read)
        os.close(write)
    assert answer == ("skip", "page")
    assert "the terminal prompt is withdrawn" in capsys.readouterr().out


def test_a_typed_answer_wins_when_it_comes_first(capsys: pytest.CaptureFixture[str]) -> None:
    desk = PauseDesk()
    desk.open("1", CHOICES)
    read, write = os.pipe()
    try:
        os.write(write, b"maybe\ncontinue\n")
        answer = pause_prompt._first_answer("paused?", list(CHOICES), desk, "1", read)
    finally:
        os.close(read)
        os.close(write)
    assert answer == ("continue", "terminal")
    assert "'maybe' is not one of" in capsys.readouterr().out
    late = desk.answer("1", "stop", "page")
    assert not late.accepted and "terminal: continue" in late.message

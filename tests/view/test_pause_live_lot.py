"""A real dry run pauses at a lot-control rule (site 2's contact breaks at part 40) and the
operator answers on the live page: over plain HTTP, and by clicking in headless Chromium. The
terminal's prompt is withdrawn, and lot.json logs the decision with its source and time."""

from __future__ import annotations

import json
import re
import subprocess
import sys
import threading
import time
import urllib.error
import urllib.request
from collections.abc import Iterator
from dataclasses import dataclass, field
from pathlib import Path

import pandas as pd
import pytest

from station.view.server import CONTROL_HEADER
from tests.support.cdp_browser import Browser, chromium_missing
from tests.support.review_datalogs import ROOT

ARGS = ["--parts", "80", "--sites", "4", "--seed", "3", "--speed", "1000", "--fixture-fault", "contact:2@40"]
CONTROL = re.compile(r"live page with bench control \(answers a lot-control pause\): (http://127\.0\.0\.1:(\d+)/)"
                     r"#control=(\S+)")


@dataclass
class PausedLot:
    process: subprocess.Popen
    out: Path
    lines: list[str] = field(default_factory=list)

    def output(self) -> str:
        return "".join(self.lines)

    def control(self, timeout: float = 60) -> tuple[str, int, str]:
        deadline = time.monotonic() + timeout
        while time.monotonic() < deadline:
            match = CONTROL.search(self.output())
            if match:
                return match[1], int(match[2]), match[3]
            time.sleep(0.05)
        raise AssertionError(f"no control address printed:\n{self.output()}")

    def lot(self) -> dict:
        return json.loads((self.out / "lot.json").read_text())

    def wait_paused(self, timeout: float = 120) -> dict:
        deadline = time.monotonic() + timeout
        while time.monotonic() < deadline:
            try:
                lot = self.lot()
            except (OSError, ValueError):       # not there yet (it is replaced whole, never half)
                lot = {}
            if lot.get("paused") is True:
                return lot
            assert self.process.poll() is None, self.output()
            time.sleep(0.05)
        raise AssertionError(f"the lot never paused:\n{self.output()}")


@pytest.fixture
def paused_lot(tmp_path: Path) -> Iterator[PausedLot]:
    (tmp_path / "px401_apps.yaml").write_text((ROOT / "sequences" / "px401_apps.yaml").read_text())
    sequence = tmp_path / "seq.yaml"
    sequence.write_text((ROOT / "sequences" / "px401_screen.yaml").read_text()
                        + "lot_control:\n  - {rule: consecutive_fails, count: 4, action: pause}\n")
    out = tmp_path / "lot"
    # stdin stays open and silent: the terminal prompt waits (nobody types at it)
    process = subprocess.Popen([sys.executable, "-m", "station.cli.main", "dry-run", *ARGS, "--sequence",
                                str(sequence), "--out", str(out), "--lot", "PAUSE-1", "--view", "0"],
                               stdin=subprocess.PIPE, stdout=subprocess.PIPE, stderr=subprocess.STDOUT, text=True)
    lot = PausedLot(process, out)

    def read() -> None:
        assert process.stdout is not None
        for line in process.stdout:
            lot.lines.append(line)

    reader = threading.Thread(target=read, daemon=True)
    reader.start()
    yield lot
    if process.poll() is None:
        process.terminate()
        process.wait(timeout=30)
    assert process.stdin is not None
    process.stdin.close()
    reader.join(timeout=10)


def _post(port: int, body: dict, token: str | None) -> tuple[int, dict]:
    headers = {"Content-Type": "application/json"} | ({CONTROL_HEADER: token} if token else {})
    request = urllib.request.Request(f"http://127.0.0.1:{port}/answer", data=json.dumps(body).encode(),
                                     headers=headers, method="POST")
    try:
        with urllib.request.urlopen(request, timeout=10) as reply:
            return reply.status, json.load(reply)
    except urllib.error.HTTPError as error:
        return error.code, json.load(error)


def _check_skipped_by_page(lot: PausedLot, started: float) -> None:
    assert lot.process.wait(timeout=120) == 0, lot.output()
    header = lot.lot()
    assert header["paused"] is False and header.get("pause") is None and header["skipped_sites"] == [2]
    [decision] = header["operator_decisions"]
    assert decision["choice"] == "skip" and decision["source"] == "page" and decision["site"] == 2
    assert decision["pause"] == "0" and header["alarms"][0]["action"] == "pause"
    when = pd.Timestamp(decision["time"]).timestamp()
    assert started - 1 <= when <= time.time() + 1
    output = lot.output()
    # withdrawn at once, or (a line typed in the same instant) refused with who answered first
    assert ("answered on the live page: skip; the terminal prompt is withdrawn" in output
            or "pause 0 was answered already, page: skip" in output), output
    assert "operator (page): skip" in output
    parts = pd.read_csv(lot.out / "parts.csv", dtype={"PART_ID": str}, keep_default_na=False)
    later = parts[(parts["SITE_NUM"] == 2)
                  & (parts["PART_ID"].str[1:].astype(int) > int(header["alarms"][0]["parts"][-1][1:]))]
    assert len(later) > 0 and (later["HARD_BIN"] == 9).all()


def test_the_page_answers_a_pause_over_http(paused_lot: PausedLot) -> None:
    _, port, token = paused_lot.control()
    started = time.time()
    header = paused_lot.wait_paused()
    pause = header["pause"]
    assert pause["id"] == "0" and pause["site"] == 2 and pause["choices"] == ["continue", "skip", "stop"]
    # no token, a wrong one: refused, and the lot still waits
    assert _post(port, {"pause": "0", "choice": "stop"}, None)[0] == 401
    assert _post(port, {"pause": "0", "choice": "stop"}, token[::-1])[0] == 403
    time.sleep(0.5)
    assert paused_lot.lot()["paused"] is True and paused_lot.process.poll() is None
    # the page's snapshot carries the open pause (once the hub has seen the new lot.json)
    deadline = time.monotonic() + 30
    while True:
        with urllib.request.urlopen(f"http://127.0.0.1:{port}/snapshot.json", timeout=10) as reply:
            snap = json.load(reply)
        if snap["paused"] or time.monotonic() > deadline:
            break
        time.sleep(0.1)
    assert snap["paused"] is True and snap["pause"]["id"] == "0"
    code, reply = _post(port, {"pause": "0", "choice": "skip"}, token)
    assert code == 200 and reply["accepted"] is True
    # a second answer, from anywhere, is too late
    code, reply = _post(port, {"pause": "0", "choice": "stop"}, token)
    assert code == 409 and "answered already, page: skip" in reply["message"]
    assert paused_lot.process.stdin is not None
    paused_lot.process.stdin.write("stop\n")     # the withdrawn terminal prompt takes nothing
    paused_lot.process.stdin.flush()
    _check_skipped_by_page(paused_lot, started)


@pytest.mark.skipif(chromium_missing() is not None, reason=str(chromium_missing()))
def test_the_operator_clicks_skip_on_the_page(paused_lot: PausedLot, tmp_path: Path) -> None:
    url, _, token = paused_lot.control()
    started = time.time()
    browser = Browser(tmp_path / "profile")
    try:
        browser.open(f"{url}#control={token}")
        # the token leaves the address bar at once (kept in this tab only)
        assert browser.wait_for("!window.location.hash && sessionStorage.getItem('station-control-token')") == token
        paused_lot.wait_paused()
        browser.wait_for("!document.getElementById('pause').hidden"
                         " && document.querySelector('#pause-buttons button[data-choice=skip]') !== null", timeout=60)
        labels = browser.evaluate("[...document.querySelectorAll('#pause-buttons button')].map(b => b.textContent)")
        assert labels == ["CONTINUE", "SKIP SITE 2", "STOP THE LOT"]
        assert "consecutive_fails (site 2)" in browser.evaluate("document.getElementById('pause-question').textContent")
        browser.evaluate("document.querySelector('#pause-buttons button[data-choice=skip]').click()")
        reply = browser.wait_for("(() => { const t = document.getElementById('answer-reply').textContent;"
                                 " return t.includes('answered') && t; })()", timeout=30)
        assert "pause 0 answered, page: skip" in reply
        # the page lists the decision from lot.json, with its source, once the lot goes on
        shown = browser.wait_for("(() => { const li = document.querySelector('#decision-list li');"
                                 " return li && li.dataset.source === 'page' && li.textContent; })()", timeout=60)
        assert shown.startswith("SKIP (page, ") and "consecutive_fails, site 2" in shown
        browser.wait_for("document.getElementById('pause').hidden", timeout=60)
    finally:
        browser.close()
    _check_skipped_by_page(paused_lot, started)


@pytest.mark.skipif(chromium_missing() is not None, reason=str(chromium_missing()))
def test_a_page_without_the_control_token_only_watches(paused_lot: PausedLot, tmp_path: Path) -> None:
    url, _, _ = paused_lot.control()
    browser = Browser(tmp_path / "profile")
    try:
        browser.open(url)
        paused_lot.wait_paused()
        note = browser.wait_for("!document.getElementById('pause').hidden"
                                " && document.getElementById('pause-note').textContent", timeout=60)
        assert "answer at the station's terminal" in note
        assert browser.evaluate("document.querySelectorAll('#pause-buttons button').length") == 0
        assert browser.evaluate("document.getElementById('mode').textContent") == "read-only page"
    finally:
        browser.close()
    assert paused_lot.process.stdin is not None
    paused_lot.process.stdin.write("stop\n")     # answered at the terminal
    paused_lot.process.stdin.flush()
    assert paused_lot.process.wait(timeout=120) == 3, paused_lot.output()
    [decision] = paused_lot.lot()["operator_decisions"]
    assert decision["choice"] == "stop" and decision["source"] == "terminal"

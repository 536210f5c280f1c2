"""The operator's answer at a lot-control pause, from whichever place answers first: the
terminal or the live page. One pause is open at a time; the first valid answer to it wins and
every later one (the other place, a second page) is refused with who answered and what.
Thread-safe: the lot's thread waits here while the terminal reader and the page's server
answer from their own threads."""

from __future__ import annotations

import threading
from dataclasses import dataclass

from station.screen.lot_rules import now_iso

SOURCES = ("terminal", "page")


@dataclass(frozen=True)
class Answer:
    choice: str
    source: str          # terminal, page, or "no operator" (nobody to ask: the safe answer)
    time: str


@dataclass(frozen=True)
class Reply:
    """What an answer got: accepted or not, and a line that says why."""

    accepted: bool
    message: str
    status: int = 200    # for the page's endpoint: 200, 400 (bad choice), 409 (no open pause / too late)
    answered: bool = False   # refused because the pause has its answer already (the page stops asking)


class PauseDesk:
    def __init__(self) -> None:
        self._lock = threading.Lock()
        self._event = threading.Event()
        self._pause: str | None = None          # the open pause's id
        self._choices: tuple[str, ...] = ()
        self._answers: dict[str, Answer] = {}  # pause id -> the answer that won

    def open(self, pause_id: str, choices: tuple[str, ...]) -> None:
        with self._lock:
            self._pause, self._choices = pause_id, tuple(choices)
            self._event.clear()

    @property
    def open_pause(self) -> str | None:
        with self._lock:
            return self._pause

    def answer(self, pause_id: str, choice: str, source: str) -> Reply:
        """Answer pause `pause_id`; accepted only if it is the open pause and nobody answered it."""
        with self._lock:
            won = self._answers.get(pause_id)
            if won is not None:
                return Reply(False, f"pause {pause_id} was answered already, {won.source}: {won.choice} "
                                    f"(at {won.time}); this answer is ignored", 409, answered=True)
            if self._pause is None or pause_id != self._pause:
                return Reply(False, f"no pause {pause_id} is waiting for an answer"
                                    + (f" (pause {self._pause} is)" if self._pause else ""), 409)
            if choice not in self._choices:
                return Reply(False, f"{choice!r} is not an answer to this pause (give one of "
                                    f"{', '.join(self._choices)})", 400)
            won = Answer(choice, source, now_iso())
            self._answers[pause_id] = won
            self._pause = None
            self._event.set()
            return Reply(True, f"pause {pause_id} answered, {source}: {choice}")

    def wait(self, pause_id: str, timeout: float | None = None) -> Answer | None:
        """The answer that won pause `pause_id`, once there is one (None at the timeout)."""
        self._event.wait(timeout)
        with self._lock:
            return self._answers.get(pause_id)

    def answered(self, pause_id: str) -> Answer | None:
        with self._lock:
            return self._answers.get(pause_id)

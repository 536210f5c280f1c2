"""What the lot loop does with lot-control alarms: log them in lot.json, tell the operator,
and act (warn, pause with the bench safe, stop). The rules themselves are lot_rules.py.

lot.json carries `alarms` (every alarm with its evidence), `paused` (true only while the
station waits for the operator) with `pause` (the open pause: its id, rule, site, message and
the answers it takes; the id is the alarm's index in `alarms`), and `operator_decisions` (each
answer with its source, terminal or page, and time), rewritten atomically by the datalog
writer at each change so that a live page can read them during the lot.
"""

from __future__ import annotations

from collections.abc import Callable
from typing import Any

from station.screen.lot_rules import Alarm, LotControl, Rule, now_iso

CHOICES = ("continue", "skip", "stop")

# decide(alarm, pause) -> (choice, source): the operator's answer and where it came from.
Decide = Callable[[Alarm, dict[str, Any]], tuple[str, str]]


class LotGuard:
    def __init__(self, rules: tuple[Rule, ...], sites: int, *, write: Callable[[dict[str, Any]], None],
                 tell: Callable[[str], None], decide: Decide,
                 make_safe: Callable[[], list[str]], power_up: Callable[[], None],
                 earlier: list[dict[str, Any]] | None = None,
                 earlier_decisions: list[dict[str, Any]] | None = None) -> None:
        self.control = LotControl(rules, sites)
        self.sites = sites
        self.write = write              # merges fields into lot.json and rewrites it
        self.tell = tell
        self.decide = decide            # the operator's answer at a pause: continue, skip, stop
        self.make_safe = make_safe
        self.power_up = power_up
        self.alarms: list[dict[str, Any]] = list(earlier or [])   # a resumed lot keeps its alarms
        self.decisions: list[dict[str, Any]] = list(earlier_decisions or [])   # and its decisions
        self.skipped: set[int] = set()

    def observe(self, part_id: str, site: int, passed: bool | None, soft_bin: int) -> None:
        self.control.observe(part_id, site, passed, soft_bin)

    def fields(self, pause: dict[str, Any] | None = None) -> dict[str, Any]:
        out: dict[str, Any] = {"alarms": self.alarms, "paused": pause is not None, "pause": pause}
        if self.decisions:
            out["operator_decisions"] = self.decisions
        if self.skipped:
            out["skipped_sites"] = sorted(self.skipped)
        return out

    def after_index(self) -> str | None:
        """Act on the alarms raised by the index just sorted; a text means: stop the lot, why."""
        alarms = self.control.take()
        if not alarms:
            return None
        for alarm in alarms:
            self.alarms.append(alarm.as_json())
            self.tell(f"LOT CONTROL {alarm.action.upper()} ({alarm.rule}): {alarm.message}")
        self.write(self.fields())
        stop = next((a for a in alarms if a.action == "stop"), None)
        if stop is not None:
            return f"lot control ({stop.rule}): {stop.message}"
        pause = next((a for a in alarms if a.action == "pause"), None)
        if pause is None:
            return None
        index = len(self.alarms) - len(alarms) + alarms.index(pause)
        return self._pause(pause, str(index))

    def _pause(self, alarm: Alarm, pause_id: str) -> str | None:
        for line in self.make_safe():
            self.tell(f"paused, safe state: {line}")
        choices = list(CHOICES) if alarm.site is not None else ["continue", "stop"]
        pause = {"id": pause_id, "rule": alarm.rule, "site": alarm.site, "message": alarm.message,
                 "choices": choices, "since": now_iso()}
        self.write(self.fields(pause))
        try:
            choice, source = self.decide(alarm, pause)
        finally:
            self.write(self.fields())
        if choice == "skip" and alarm.site is None:
            self.tell("this alarm names no site to skip: the lot stops")
            choice = "stop"
        self.decisions.append({"rule": alarm.rule, "site": alarm.site, "choice": choice, "source": source,
                               "pause": pause_id, "time": now_iso()})
        if choice == "skip":
            self.skipped.add(int(alarm.site or 0))
        self.write(self.fields())
        if choice == "stop":
            return f"stopped by the operator at a lot-control pause ({alarm.rule}): {alarm.message}"
        if len(self.skipped) >= self.sites:
            return "every site is skipped: nothing left to test"
        self.tell(f"operator ({source}): {choice}"
                  + (f" (site {alarm.site} is skipped from now on)" if choice == "skip" else ""))
        self.power_up()
        return None


def no_operator(alarm: Alarm, pause: dict[str, Any]) -> tuple[str, str]:
    """With nobody to ask, a pause stops the lot (the safe answer)."""
    return "stop", "no operator"

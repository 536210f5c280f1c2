"""Lot-control alarms as lot.json carries them, for the page.

The contract with lot control: ``"alarms": [{"rule", "action", "site", "message", "parts",
"time"}]`` and ``"paused": bool``; both may be absent (no alarm, not paused). An entry that
does not have this shape is not dropped: it is shown as a problem, so nothing is hidden from
the operator.
"""

from __future__ import annotations

from typing import Any

from pydantic import BaseModel, ConfigDict, ValidationError, field_validator


class Alarm(BaseModel):
    model_config = ConfigDict(extra="ignore")

    rule: str
    action: str = ""
    site: int | None = None
    message: str = ""
    parts: list[str] = []
    time: str | float | None = None

    @field_validator("parts", mode="before")
    @classmethod
    def _ids_as_text(cls, value: Any) -> Any:
        # Part ids are text in the datalog even when they look like numbers.
        return [str(v) for v in value] if isinstance(value, list) else value


def read_alarms(header: dict[str, Any]) -> tuple[list[dict[str, Any]], list[str]]:
    """(alarms, problems) of a lot header: each alarm as a plain dict, newest last."""
    raw = header.get("alarms")
    if raw is None:
        return [], []
    if not isinstance(raw, list):
        return [], [f"lot.json: alarms: expected a list, got {type(raw).__name__}"]
    alarms, problems = [], []
    for index, entry in enumerate(raw):
        try:
            alarms.append(Alarm.model_validate(entry).model_dump())
        except ValidationError as exc:
            first = exc.errors()[0]
            key = ".".join(str(part) for part in first["loc"]) or "entry"
            problems.append(f"lot.json: alarms[{index}].{key}: {first['msg']} (an alarm that cannot be shown)")
    return alarms, problems

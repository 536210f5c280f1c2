"""The shape of lot.json's fields that the tools read back (docs/datalog-format.md).

The station writes lot.json; the review tools, resume, seal and STDF export read it. A header
edited by hand or damaged (``hard_bins: 5``) is refused here with the key that is wrong,
instead of failing deep inside a summary. Fields not listed are kept as they are.
"""

from __future__ import annotations

from typing import Any, Literal

from pydantic import BaseModel, ConfigDict, Field, ValidationError


class _Open(BaseModel):
    model_config = ConfigDict(extra="allow")


class BinCount(_Open):
    name: str
    pass_: bool = Field(alias="pass")
    count: int | None = Field(None, ge=0)   # written at the end of the lot


class ConfigCopy(_Open):
    file: str
    sha256: str | None = None


class AlarmRecord(_Open):
    """One lot-control alarm (station/screen/lot_rules.py); a live page reads these."""

    rule: str
    action: Literal["warn", "pause", "stop"]
    site: int | None
    message: str
    parts: list[str]
    time: str


class PauseRecord(_Open):
    """The open lot-control pause (station/screen/lot_guard.py); the live page answers it."""

    id: str
    rule: str
    site: int | None
    choices: list[str]


class LotHeaderFields(_Open):
    lot_id: str | None = None
    product: str | None = None
    station: str | None = None
    operator: str | None = None
    sites: int | None = Field(None, ge=1, le=64)
    complete: bool | None = None
    parts_tested: int | None = Field(None, ge=0)
    start_t: float | None = None
    end_t: float | None = None
    span_v: float | None = None
    hard_bins: dict[int, BinCount] | None = None
    soft_bins: dict[int, BinCount] | None = None
    sequence: ConfigCopy | None = None
    limits: ConfigCopy | None = None
    bench: ConfigCopy | None = None
    instruments: dict[str, str] | None = None
    alarms: list[AlarmRecord] | None = None
    paused: bool | None = None
    pause: PauseRecord | None = None


def header_problem(header: dict[str, Any]) -> tuple[str, str] | None:
    """(key path, what is wrong) of the first field that does not have its shape, or None."""
    try:
        LotHeaderFields.model_validate(header)
    except ValidationError as exc:
        first = exc.errors()[0]
        key = ".".join(str(part) for part in first["loc"])
        return key, f"{first['msg']}, got {first.get('input')!r}"[:200]
    return None

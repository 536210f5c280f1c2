"""Correlation (golden) units: reference parts with known values, tested before a lot; a
station whose measurements of them are out of tolerance does not test (common practice, no
source).

The units file (YAML) names each unit and, per figure, its reference value and tolerance:

    product: PX-401
    units:
      - id: D00001
        figures:
          vos:       {reference: 6.1 uV, tolerance: 1 uV}
          cmrr low:  {reference: 128 dB, tolerance: 4 dB}

A figure is `param` or `param region` as the datalog logs it (PARAM, REGION). A unit is in
correlation when |measured - reference| <= tolerance for every figure listed; a unit that was
not measured, or a figure without a value, is out of correlation.
"""

from __future__ import annotations

import math
from dataclasses import dataclass
from pathlib import Path
from typing import Any

import pandas as pd
from pydantic import BaseModel, ConfigDict, Field, StrictStr

from station.config.files import load_yaml_file, validate_model
from station.config.parameters import PARAMETERS
from station.config.quantities import parse_quantity
from station.errors import Refused
from station.review.units import fmt


class _Model(BaseModel):
    model_config = ConfigDict(extra="forbid")


class _FigureModel(_Model):
    reference: Any
    tolerance: Any


class _UnitModel(_Model):
    id: StrictStr
    figures: dict[StrictStr, _FigureModel] = Field(min_length=1)


class _FileModel(_Model):
    product: StrictStr
    note: StrictStr = ""
    units: list[_UnitModel] = Field(min_length=1)


@dataclass(frozen=True)
class Reference:
    unit: str
    param: str
    region: str
    value: float
    tolerance: float
    units: str

    @property
    def figure(self) -> str:
        return f"{self.param} {self.region}".strip()


@dataclass(frozen=True)
class UnitsFile:
    product: str
    references: tuple[Reference, ...]
    source: str


def load_units(path: Path) -> UnitsFile:
    doc = load_yaml_file(path)
    model = validate_model(doc, _FileModel)
    refs = []
    for i, unit in enumerate(model.units):
        for name, figure in unit.figures.items():
            where: list[str | int] = ["units", i, "figures", name]
            param, _, region = name.partition(" ")
            if param not in PARAMETERS:
                raise doc.error(where, f"{param!r} is not a parameter the station logs",
                                f"one of {', '.join(sorted(PARAMETERS))}")
            units = PARAMETERS[param].units
            values = {}
            for key in ("reference", "tolerance"):
                try:
                    values[key] = parse_quantity(getattr(figure, key), units)
                except ValueError as exc:
                    raise doc.error([*where, key], f"{name}: {exc}") from None
            if not values["tolerance"] > 0:
                raise doc.error([*where, "tolerance"], "a tolerance must be above 0")
            refs.append(Reference(unit.id, param, region.strip(), values["reference"], values["tolerance"], units))
    return UnitsFile(model.product, tuple(refs), str(path))


@dataclass(frozen=True)
class Finding:
    ref: Reference
    measured: float | None

    @property
    def in_correlation(self) -> bool:
        return (self.measured is not None and math.isfinite(self.measured)
                and abs(self.measured - self.ref.value) <= self.ref.tolerance)

    def line(self) -> str:
        r = self.ref
        got = "not measured" if self.measured is None else fmt(self.measured, r.units, 5, True)
        state = "ok" if self.in_correlation else "OUT OF CORRELATION"
        return (f"{r.figure} on unit {r.unit}: measured {got}, reference {fmt(r.value, r.units, 5, True)}, "
                f"tolerance +-{fmt(r.tolerance, r.units, 3, True)}: {state}")

    def record(self) -> dict[str, Any]:
        r = self.ref
        return {"unit": r.unit, "figure": r.figure, "units": r.units, "measured": self.measured,
                "reference": r.value, "tolerance": r.tolerance, "ok": self.in_correlation}


def correlate(results: pd.DataFrame, units: UnitsFile) -> list[Finding]:
    """Each reference against the unit's last measured value of that figure."""
    findings = []
    for ref in units.references:
        rows = results[(results["PART_ID"].astype(str) == ref.unit) & (results["PARAM"].astype(str) == ref.param)
                       & (results["REGION"].astype(str) == ref.region)]
        measured = float(rows["RESULT"].iloc[-1]) if not rows.empty else None
        findings.append(Finding(ref, measured))
    return findings


# A correlation older than this does not vouch for a lot (a shift; our rule, no source).
MAX_CORRELATION_AGE_S = 12 * 3600.0


def correlation_gate(folder: Path, station: str, now: float) -> dict[str, Any]:
    """The record a lot keeps of the correlation run in `folder`; CorrelationRefused (one line)
    if that run is not a passed correlation of this station within MAX_CORRELATION_AGE_S."""
    from station.datalog.folder import DatalogError, read_lot_header

    try:
        header = read_lot_header(folder)
    except DatalogError as exc:
        raise CorrelationRefused(str(exc)) from None
    record = header.get("correlation")
    if not isinstance(record, dict):
        raise CorrelationRefused(f"{folder}: not a correlation run (lot.json has no 'correlation'): "
                                 "run station correlate first")
    if header.get("station") != station:
        raise CorrelationRefused(f"{folder}: correlated station {header.get('station')!r}, not this bench's "
                                 f"{station!r}: correlate this station")
    if not record.get("in_correlation"):
        bad: dict[str, Any] = next((f for f in record.get("figures", []) if not f.get("ok")), {})
        raise CorrelationRefused(f"{folder}: station out of correlation ({bad.get('figure', '?')} on unit "
                                 f"{bad.get('unit', '?')}): fix the bench and correlate again; nothing tested")
    ended = header.get("end_t")
    if not isinstance(ended, int | float) or now - float(ended) > MAX_CORRELATION_AGE_S:
        raise CorrelationRefused(f"{folder}: the correlation is older than {MAX_CORRELATION_AGE_S / 3600:g} h "
                                 "(or has no end time): correlate again")
    return {"folder": str(folder), "lot_id": header.get("lot_id"), "end_time": header.get("end_time"),
            "in_correlation": True, "figures": len(record.get("figures", []))}


class CorrelationRefused(Refused):
    """The lot may not start: no passed, recent correlation of this station (exit 2)."""

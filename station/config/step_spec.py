"""The schema of one test entry of a sequence file, and of its settling policy.

Every test kind (station/kinds) declares the keys of its entry as a subclass of `StepSpec`
(pydantic, with the field types of station/config/fields.py) and turns a validated entry into
its part of the `TestStep` record; the sequence loader only dispatches on `kind:`. The sane
ranges come from the instruments' own limits (the drivers): a value outside is a typo or a
unit slip, refused at load before anything is powered.
"""

from __future__ import annotations

from typing import Annotated, Any, Literal

from pydantic import AfterValidator, BeforeValidator, ValidationInfo, model_validator

from drivers.force import INSTRUMENT_MAX_V as FORCE_MAX_V
from drivers.supply import INSTRUMENT_MAX_V as SUPPLY_MAX_V
from station.config.fields import (
    Flag,
    Strict,
    Text,
    count,
    plain_float,
    plain_number,
    quantity,
    refuse,
)

SLIP_S = "a settling or integration time over a minute is a slip of the unit"
MAX_SPAN_V = 2 * SUPPLY_MAX_V
SPAN_WHY = f"two rails of at most {SUPPLY_MAX_V:g} V each"

Seconds = Annotated[float, quantity("s", ge=0, le=60, why=SLIP_S)]
PositiveSeconds = Annotated[float, quantity("s", gt=0, le=60, why=SLIP_S)]
Span = Annotated[float, quantity("V", gt=0, le=MAX_SPAN_V, why=SPAN_WHY)]


def _nplc(value: Any) -> float:
    number = plain_float(value)
    if number is None or not 0.02 <= number <= 100:  # also refuses nan
        refuse(f"NPLC must be from 0.02 to 100, got {value!r}",
               "write the integration in power-line cycles, e.g. nplc: 1")
    return number


Nplc = Annotated[float, BeforeValidator(_nplc)]


StableWithin = Literal["auto"] | Annotated[float, quantity("V", gt=0, le=1.0,
                                                         why="a settling band is microvolts to millivolts")]


class SettleSpec(Strict):
    """settle: {wait} (fixed) or {stable_within, min, max[, sigmas, tail]} (adaptive)."""

    wait: Seconds | None = None
    stable_within: StableWithin | None = None
    min: Seconds = 0.0
    max: PositiveSeconds | None = None
    sigmas: Annotated[float, plain_number(gt=0)] | None = None
    tail: PositiveSeconds | None = None

    @model_validator(mode="after")
    def _one_policy(self) -> SettleSpec:
        if (self.wait is None) == (self.stable_within is None):
            refuse("give either 'wait' (fixed settling) or 'stable_within' (adaptive settling), "
                   "not both or neither",
                   "e.g. settle: {wait: 50 ms} or settle: {stable_within: auto, max: 300 ms}")
        auto = self.stable_within == "auto"
        for key in ("sigmas", "tail"):
            if getattr(self, key) is not None and not auto:
                refuse(f"'{key}' applies only to 'stable_within: auto'",
                       "remove it, or write stable_within: auto")
        if self.max is not None and self.min > self.max:
            refuse("'min' must be from 0 up to 'max'", "lower min or raise max")
        return self


class StepSpec(Strict):
    """The keys every test entry may have; a kind's own spec adds its keys."""

    kind: str
    name: Text | None = None
    nplc: Nplc | None = None
    average: Annotated[int, count(1, 1000)] = 1
    settle: SettleSpec | None = None
    stop_on_fail: Flag | None = None


def _at_least_two(what: str, example: str) -> Any:
    def check(value: Any) -> Any:
        if not isinstance(value, list) or len(value) < 2:
            refuse(f"expected a list of at least two {what}", f"e.g. {example}")
        return value
    return BeforeValidator(check)


def _distinct(what: str) -> Any:
    def check(values: tuple[float, ...]) -> tuple[float, ...]:
        if len(set(values)) < 2:
            refuse(f"the {what} must differ, or no slope can be measured", "write two different values")
        return values
    return AfterValidator(check)


def volt_list(what: str, example: str, *, ge: float | None = None, gt: float | None = None,
              le: float, why: str) -> Any:
    """A list of at least two different voltages, each inside the given bounds."""
    item = Annotated[float, quantity("V", ge=ge, gt=gt, le=le, why=why)]
    return Annotated[tuple[item, ...], _at_least_two(what, example), _distinct(what)]


ForceLevels = volt_list("output levels", "levels: [-4 V, 4 V]", ge=-FORCE_MAX_V, le=FORCE_MAX_V,
                        why=f"the force source spans +-{FORCE_MAX_V:g} V")
SupplySpans = volt_list("supply spans", "spans: [8 V, 12 V]", gt=0, le=MAX_SPAN_V, why=SPAN_WHY)


def span_of(info: ValidationInfo) -> float:
    """The sequence's nominal span, given to a step's validation as context."""
    context = info.context or {}
    return float(context.get("span_v", 0.0))


"""The PAT layer of a limit table: the `pat:` section (docs/outlier-screening.md).

    pat:
      hard_bin: 7            # where outliers go; a hard bin of the table (pass: false, unless
                             # the table says outliers may ship)
      limits:                # static PAT limits, written by `station limits pat`
        - {param: vos, low: -61.2 uV, high: 60.8 uV, soft_bin: 41, bin: PAT Offset}
      dynamic:               # optional: limits from the lot's own first passing parts
        baseline: 30         # passing parts in the baseline (at least 30)
        sigma: 6
        soft_bin: 49
        params: [vos, iq]    # optional: the figures screened (default: every limited figure)
      basis: {...}           # optional, free: how the static limits were computed

A part is screened by PAT only once it passed a grade: PAT limits are tighter than the data
sheet's, never looser (`station limits pat` clips them), and a part outside goes to the PAT
hard bin with the soft bin of the limit it broke.
"""

from __future__ import annotations

from dataclasses import dataclass, field
from typing import Annotated, Any

from pydantic import BaseModel, ConfigDict, Field, StrictInt, StrictStr

from station.config.files import YamlDocument, validate_model
from station.config.limit_tables import BinDef, Limit, _limit

MIN_BASELINE = 30
BinNumber = Annotated[StrictInt, Field(ge=0, le=32767)]


@dataclass(frozen=True)
class DynamicPat:
    baseline: int
    sigma: float
    soft_bin: int
    params: tuple[str, ...] | None   # None: every figure the loosest grade limits


@dataclass(frozen=True)
class PatLayer:
    hard_bin: int
    limits: tuple[Limit, ...] = ()
    dynamic: DynamicPat | None = None
    basis: dict[str, Any] = field(default_factory=dict)
    soft_bins: dict[int, BinDef] = field(default_factory=dict)


class _Model(BaseModel):
    model_config = ConfigDict(extra="forbid")


class _PatLimit(_Model):
    param: StrictStr
    region: StrictStr | None = None
    low: Any = None
    high: Any = None
    soft_bin: BinNumber
    bin: StrictStr


class _Dynamic(_Model):
    baseline: StrictInt = Field(MIN_BASELINE, ge=MIN_BASELINE, le=100000)
    sigma: float = Field(6.0, gt=0, le=20)
    soft_bin: BinNumber
    bin: StrictStr = "Dynamic PAT outlier"
    params: list[StrictStr] | None = None


class _Pat(_Model):
    hard_bin: BinNumber
    limits: list[_PatLimit] = []
    dynamic: _Dynamic | None = None
    basis: dict[str, Any] = {}


def read_pat_layer(doc: YamlDocument, regions: dict[str, str], hard_bins: dict[int, BinDef],
                   soft_bins: dict[int, BinDef]) -> PatLayer | None:
    """The `pat:` section checked against the rest of the table, or None when there is none.

    `regions`: region name -> kind; `soft_bins`: the table's own, which PAT bins must not reuse."""
    data = doc.data.get("pat") if isinstance(doc.data, dict) else None
    if data is None:
        return None
    model = validate_model(doc, _Pat, data=data, at=["pat"])
    if model.hard_bin not in hard_bins:
        defined = ", ".join(str(n) for n in sorted(hard_bins))
        raise doc.error(["pat", "hard_bin"], f"hard bin {model.hard_bin} is not defined (defined: {defined})",
                        "add it under hard_bins, e.g. {name: PAT outlier, pass: false}")
    own: dict[int, BinDef] = {}

    def add(path: list[str | int], number: int, name: str) -> None:
        if number in soft_bins:
            raise doc.error(path, f"soft bin {number} is already the table's {soft_bins[number].name!r}",
                            "give PAT outliers soft bins of their own")
        if number in own and own[number].name != name:
            raise doc.error(path, f"soft bin {number} has two names: {own[number].name!r} and {name!r}",
                            "one name per soft bin number")
        own[number] = BinDef(number, name, False)

    limits = []
    seen: set[tuple[str, str | None]] = set()
    for i, entry in enumerate(model.limits):
        path: list[str | int] = ["pat", "limits", i]
        limit = _limit(doc, path, entry, regions)  # type: ignore[arg-type]  # same fields as a grade's limit
        if (limit.param, limit.region) in seen:
            raise doc.error(path, f"PAT limits {limit.param} {limit.region or ''} twice", "merge them")
        seen.add((limit.param, limit.region))
        add([*path, "soft_bin"], limit.soft_bin, limit.bin_name)
        limits.append(limit)
    dynamic = None
    if model.dynamic is not None:
        d = model.dynamic
        add(["pat", "dynamic", "soft_bin"], d.soft_bin, d.bin)
        dynamic = DynamicPat(d.baseline, float(d.sigma), d.soft_bin, tuple(d.params) if d.params else None)
    return PatLayer(model.hard_bin, tuple(limits), dynamic, dict(model.basis), own)

"""A fixture that breaks mid-lot: one site's contact lost from part k on, or a leakage on one
site that grows part by part (invented fault models, for testing lot control end to end).

Written as text for the command line: ``contact:SITE@PART`` (site SITE makes no contact with
any part from lot part number PART on) or ``leakage:SITE@PART:AMPS`` (from part PART on, site
SITE draws AMPS more supply current for every part seated since, with a seeded 10 % jitter).
"""

from __future__ import annotations

import re
from dataclasses import dataclass

import numpy as np

KINDS = ("contact", "leakage")
_PATTERN = re.compile(r"^(contact|leakage):(\d+)@(\d+)(?::([0-9.eE+-]+)\s*(uA|nA|mA|A)?)?$")
_SCALE = {"nA": 1e-9, "uA": 1e-6, "mA": 1e-3, "A": 1.0, None: 1.0}


@dataclass(frozen=True)
class FixtureFault:
    kind: str
    site: int
    from_part: int            # 1-based number of the first part of the lot it touches
    step_a: float = 0.0       # leakage: added per part

    def text(self) -> str:
        tail = f":{self.step_a:g}A" if self.kind == "leakage" else ""
        return f"{self.kind}:{self.site}@{self.from_part}{tail}"


def parse_fixture_fault(text: str) -> FixtureFault:
    match = _PATTERN.match(text.strip())
    if match is None:
        raise ValueError(f"cannot read fixture fault {text!r}: write contact:SITE@PART or "
                         "leakage:SITE@PART:STEP (e.g. contact:2@40, leakage:3@100:5uA)")
    kind, site, part, step, unit = match.groups()
    if kind == "leakage" and step is None:
        raise ValueError(f"fixture fault {text!r}: a leakage needs its growth per part, e.g. leakage:3@100:5uA")
    fault = FixtureFault(kind, int(site), int(part), float(step) * _SCALE[unit] if step else 0.0)
    if fault.site < 1 or fault.from_part < 1:
        raise ValueError(f"fixture fault {text!r}: site and part count from 1")
    return fault


def contact_broken(faults: tuple[FixtureFault, ...], site: int, part_index: int) -> bool:
    """True if `site` makes no contact with lot part number part_index + 1."""
    return any(f.kind == "contact" and f.site == site and part_index + 1 >= f.from_part for f in faults)


def leakage_a(faults: tuple[FixtureFault, ...], site: int, part_index: int, seed: int) -> float:
    """Extra supply current of `site` while part part_index + 1 is seated."""
    total = 0.0
    for f in faults:
        if f.kind == "leakage" and f.site == site and part_index + 1 >= f.from_part:
            jitter = 1.0 + 0.1 * float(np.random.default_rng([seed, site, part_index]).normal())
            total += f.step_a * (part_index + 2 - f.from_part) * max(jitter, 0.0)
    return total

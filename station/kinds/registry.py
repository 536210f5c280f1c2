"""The test kinds a sequence may list, by the name written under `kind:`, and the rows each
step logs (laid out by its kind, numbered by its position in the sequence).

A new kind: its module beside this one, and one line in KINDS.
"""

from __future__ import annotations

from typing import TYPE_CHECKING

from station.config.test_catalog import StepRows, StepTests
from station.kinds.ac_cmrr import AcCmrr
from station.kinds.base import KindContext, TestKind
from station.kinds.bias_current import BiasCurrent
from station.kinds.budget import ErrorBudget
from station.kinds.cm_sweep import CommonModeSweep
from station.kinds.contact import ContactCheck
from station.kinds.diff_cmrr import DiffAmpCmrr
from station.kinds.gain import OpenLoopGain
from station.kinds.offset import OffsetAtNominal
from station.kinds.supply_current import SupplyCurrent
from station.kinds.supply_rejection import SupplyRejection

if TYPE_CHECKING:
    from station.config.sequence import TestStep

KINDS: dict[str, TestKind] = {kind.name: kind for kind in (
    ContactCheck(),
    OffsetAtNominal(),
    CommonModeSweep(),
    OpenLoopGain(),
    SupplyRejection(),
    SupplyCurrent(),
    BiasCurrent(),
    DiffAmpCmrr(),
    AcCmrr(),
    ErrorBudget(),
)}


def kind_of(step: TestStep) -> TestKind:
    return KINDS[step.kind]


def step_tests(step: TestStep, context: KindContext) -> StepTests:
    """The rows `step` logs, numbered by its position in the sequence."""
    rows = StepRows(step.index)
    kind_of(step).lay_out(step, rows, context)
    return rows.done()

"""Escapes against the simulator's truth, judged on the spec limits."""

from __future__ import annotations

import pandas as pd

from station.cli.main import DEMO_LIMITS
from station.config.limit_tables import load_limit_table
from station.qualify.escapes import escapes, true_grade_breaks


def test_a_part_sorted_to_a_grade_its_true_offset_breaks_is_an_escape():
    table = load_limit_table(DEMO_LIMITS)          # grade A: |Vos| <= 50 uV, grade B: 150 uV
    truth = pd.DataFrame({"PART_ID": ["P1", "P2", "P3"], "VOS_LOW_V": [49e-6, 51e-6, 160e-6],
                          "IQ_A": [450e-6] * 3, "CMRR_LOW_DB": [130.0] * 3, "CMRR_HIGH_DB": [120.0] * 3,
                          "PSRR_DB": [130.0] * 3})
    breaks = true_grade_breaks(truth, table)
    assert breaks == {"A": {"P2", "P3"}, "B": {"P3"}}
    sorted_as = pd.DataFrame({"PART_ID": ["P1", "P2", "P3", "P3"], "PASS": [1, 1, 0, 1],
                              "GRADE": ["A", "A", "", "B"]})   # P3's last row is its result
    assert escapes(sorted_as, breaks) == {"A": 1, "B": 1}
    guarded = sorted_as.assign(GRADE=["A", "B", "", ""], PASS=[1, 1, 0, 0])
    assert escapes(guarded, breaks) == {"A": 0, "B": 0}

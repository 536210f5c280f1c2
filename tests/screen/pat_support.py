"""Test support: the demo limit table with a PAT section (hard bin 7), for the screen tests."""

from __future__ import annotations

from tests.support.review_datalogs import PX401_LIMITS


def pat_table_text(extra: str = "") -> str:
    """limits/px401.yaml plus hard bin 7 'PAT outlier' and `pat: {hard_bin: 7}` (+ `extra` lines)."""
    text = PX401_LIMITS.read_text(encoding="utf-8")
    text = text.replace("  6: {name: Contact fail, pass: false}\n",
                        "  6: {name: Contact fail, pass: false}\n  7: {name: PAT outlier, pass: false}\n")
    return text + "\npat:\n  hard_bin: 7\n" + extra

"""The benchmark's figures as a rich table, with each target and whether it was met."""

from __future__ import annotations

import math

from rich.console import Console
from rich.table import Table

# key: (label, target text, check)
TARGETS = {
    "floor_ratio": ("test time / physics floor (1 site)", "<= 1.2", lambda v: v <= 1.2),
    "floor_ratio_4_sites": ("test time / physics floor (4 sites)", "", None),
    "adaptive_speedup": ("fixed worst-case settle / adaptive", ">= 1.5", lambda v: v >= 1.5),
    "overhead_ratio": ("station / plain pyvisa replay (ideal bench)", "<= 1.25", lambda v: v <= 1.25),
    "link_replay_ratio": ("replay through drivers/scpi_link / plain", "", None),
    "multisite_speedup_4": ("parts/h 4 sites / 1 site (DMM per site)", ">= 3.0", lambda v: v >= 3.0),
    "multisite_speedup_4_single_dmm": ("parts/h 4 sites / 1 site (one DMM)", "", None),
    "escapes": ("escapes (accuracy lot)", "= 0", lambda v: v == 0),
    "misbin_rate": ("misbin rate (accuracy lot)", "", None),
    "datalog_rows_per_s": ("datalog writer rows/s", "", None),
    "summary_1m_rows_s": ("summary of 1M rows, s", "<= 5", lambda v: v <= 5),
    "hislip_round_trip_ratio": ("*IDN? round trip, HiSLIP / raw socket (loopback)", "", None),
}


def _fmt(value) -> str:
    if value is None:
        return "missing"
    if isinstance(value, float):
        if math.isnan(value):
            return "nan"
        return f"{value:.3g}" if abs(value) < 1e4 else f"{value:,.0f}"
    return str(value)


def print_report(figures: dict, console: Console | None = None) -> None:
    console = console or Console()
    table = Table(title=f"ampscreen benchmark ({figures['mode']}{', ' + figures['only'] if figures.get('only') else ''})")
    for column in ("figure", "value", "target", "met"):
        table.add_column(column)
    for key, (label, target, check) in TARGETS.items():
        if figures.get("only") and key not in figures:
            continue                    # a run of one section shows that section only
        value = figures.get(key)
        met = "" if check is None or value is None or (isinstance(value, float) and math.isnan(value)) \
            else ("yes" if check(value) else "NO")
        table.add_row(f"{key}\n[dim]{label}[/]", _fmt(value), target, met)
    for region, value in figures.get("cmrr_rms_error_db", {}).items():
        table.add_row(f"cmrr_rms_error_db.{region}", _fmt(value), "", "")
    console.print(table)
    detail = Table(title="details")
    detail.add_column("figure")
    detail.add_column("value")
    for key in ("test_s_per_part", "floor_s_per_part", "fixed_test_s_per_part", "fixed_wait_s",
                "groups_per_condition", "timeouts_per_part", "overhead_ratio_range",
                "overhead_ratio_fastest_runs", "replay_ms_per_transaction", "transactions", "accuracy_parts", "misbins", "compare_parts", "summary_rows",
                "summary_load_and_summarise_s", "summary_summarise_only_s"):
        if key in figures:
            detail.add_row(key, _fmt(figures[key]))
    for transport, micros in figures.get("round_trip_us", {}).items():
        spread = figures.get("round_trip_spread", {}).get(transport, "")
        detail.add_row(f"*IDN? round trip, {transport}", f"{micros:.0f} us median, {spread}")
    for name, pph in figures.get("parts_per_hour", {}).items():
        detail.add_row(f"parts/h, {name}", _fmt(pph))
    for which in ("adaptive_common", "fixed_common"):
        errors = figures.get(f"rms_errors_{which}", {})
        detail.add_row(f"rms error vs truth, {which.replace('_common', '')}",
                       ", ".join(f"{k} {_fmt(v)}" for k, v in errors.items()))
    machine = figures.get("machine", {})
    detail.add_row("machine", ", ".join(f"{k} {v}" for k, v in machine.items()))
    console.print(detail)

"""The benchmark's figures as a rich table, with each target and whether it was met."""

from __future__ import annotations

import math

from rich.console import Console
from rich.table import Table

from benchmarks.machine import busy_at_start

# key: (label, target text, check)
TARGETS = {
    "floor_ratio": ("test time / physics floor (1 site)", "<= 1.10", lambda v: v <= 1.10),
    "floor_ratio_4_sites": ("test time / physics floor (4 sites)", "<= 1.05", lambda v: v <= 1.05),
    "adaptive_speedup": ("fixed worst-case settle / adaptive", ">= 1.5", lambda v: v >= 1.5),
    "overhead_ratio": ("station / plain pyvisa replay (ideal bench)", "<= 1.15", lambda v: v <= 1.15),
    "link_replay_ratio": ("replay through drivers/scpi_link / plain", "", None),
    "station_cpu_ms_per_part": ("station process CPU per part, ms (bench in its own process)", "", None),
    "station_cpu_pct_of_test_time": ("station CPU / the part's test time, %", "<= 2", lambda v: v <= 2.0),
    "multisite_speedup_4": ("parts/h 4 sites / 1 site (DMM per site)", ">= 3.6", lambda v: v >= 3.6),
    "multisite_speedup_4_single_dmm": ("parts/h 4 sites / 1 site (one DMM)", ">= 2.0", lambda v: v >= 2.0),
    "escapes": ("escapes (accuracy lot)", "= 0", lambda v: v == 0),
    "misbin_rate": ("misbin rate (accuracy lot)", "= 0", lambda v: v == 0),
    "datalog_rows_per_s": ("datalog writer rows/s", "", None),
    "summary_1m_rows_s": ("summary of 1M rows, s", "<= 1.0", lambda v: v <= 1.0),
    "summary_1m_peak_rss_mb": ("peak RSS of the 1M-row summary, MB", "< 1500", lambda v: v < 1500),
    "soak_rss_growth_mb": ("RSS after 10,000 parts - after 500, MB (dry run, compressed)", "< 10",
                           lambda v: v < 10),
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


def _pct(share) -> str:
    return "?" if share is None else f"{100 * share:.0f} %"


def print_report(figures: dict, console: Console | None = None) -> None:
    console = console or Console()
    table = Table(title=f"ampscreen benchmark ({figures['mode']}{', ' + figures['only'] if figures.get('only') else ''})")
    for column in ("figure", "value", "target", "met", "load"):
        table.add_column(column)
    loaded = set(figures.get("loaded_keys", []))
    for key, (label, target, check) in TARGETS.items():
        if figures.get("only") and key not in figures:
            continue                    # a run of one section shows that section only
        value = figures.get(key)
        met = "" if check is None or value is None or (isinstance(value, float) and math.isnan(value)) \
            else ("yes" if check(value) else "NO")
        table.add_row(f"{key}\n[dim]{label}[/]", _fmt(value), target, met,
                      "[red]LOADED[/]" if key in loaded else "")
    for region, value in figures.get("cmrr_rms_error_db", {}).items():
        table.add_row(f"cmrr_rms_error_db.{region}", _fmt(value), "", "")
    console.print(table)
    machine = figures.get("machine", {})
    console.print(f"machine: {machine.get('cpu', '?')}, {machine.get('cores', '?')} cores, Python "
                  f"{machine.get('python', '?')}; load average at start {machine.get('load_average_at_start')}")
    if busy_at_start(machine):
        console.print("[red]warning: the load average shows other work on the machine at the start; "
                      "timing figures may be slow (sections where others took CPU are marked LOADED)[/]")
    for section, watch in figures.get("load", {}).items():
        mark = "[red]LOADED: other work was running, its figures are marked[/]" if watch["loaded"] else "quiet"
        console.print(f"  {section}: load average {watch['load_average_1m_at_start']} at start, other processes "
                      f"{_pct(watch['other_processes_cpu_share'])} of the cores over {watch['wall_s']} s: {mark}")
    detail = Table(title="details")
    detail.add_column("figure")
    detail.add_column("value")
    for key in ("floor_ratio_runs", "floor_ratio_4_sites_runs", "multisite_speedup_4_runs",
                "station_cpu_ms_per_part_1_site", "soak_rss_mb", "soak_parts", "soak_wall_s",
                "summary_imports_rss_mb", "summary_fresh_process_s",
                "test_s_per_part", "floor_s_per_part", "fixed_test_s_per_part", "fixed_wait_s",
                "groups_per_condition", "timeouts_per_part", "overhead_ratio_range",
                "overhead_ratio_fastest_runs", "replay_ms_per_transaction", "transactions", "accuracy_parts", "misbins", "compare_parts", "summary_rows",
                "summary_load_and_summarise_s", "summary_summarise_only_s"):
        if key in figures:
            detail.add_row(key, _fmt(figures[key]))
    for line in figures.get("wrongly_binned", []):
        detail.add_row("misbinned or escaped", line)
    for transport, micros in figures.get("round_trip_us", {}).items():
        spread = figures.get("round_trip_spread", {}).get(transport, "")
        detail.add_row(f"*IDN? round trip, {transport}", f"{micros:.0f} us median, {spread}")
    for name, pph in figures.get("parts_per_hour", {}).items():
        detail.add_row(f"parts/h, {name}", _fmt(pph))
    for which in ("adaptive_common", "fixed_common"):
        errors = figures.get(f"rms_errors_{which}", {})
        detail.add_row(f"rms error vs truth, {which.replace('_common', '')}",
                       ", ".join(f"{k} {_fmt(v)}" for k, v in errors.items()))
    detail.add_row("machine", ", ".join(f"{k} {v}" for k, v in machine.items()))
    console.print(detail)

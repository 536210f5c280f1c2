"""Limit-table tools for the engineer: check, show, diff.

(Proposing a table from characterisation data is station/review/propose.py.)
"""

from __future__ import annotations

from dataclasses import dataclass

from rich.table import Table

from station.config.limit_tables import NOMINAL_SPAN_V, Grade, Limit, LimitTable
from station.review.units import fmt

HEAD = "bold dark_cyan"


def check_summary(table: LimitTable) -> str:
    """One line saying what a valid table holds."""
    grades = ", ".join(g.name for g in table.grades)
    limits = sum(len(g.limits) for g in table.grades)
    return (f"OK: {table.source}: product {table.product}, grades {grades}, {len(table.regions)} regions, "
            f"{limits} limits, {len(table.hard_bins)} hard bins, {len(table.soft_bins)} soft bins")


def _limit_cell(value: float | None, units: str) -> str:
    return "" if value is None else fmt(value, units, digits=6, with_unit=True)


def region_text(table: LimitTable, name: str | None, span_v: float = NOMINAL_SPAN_V) -> str:
    if not name:
        return ""
    for region in table.regions:
        if region.name == name:
            lo, hi = region.lower.vcm(span_v), region.upper.vcm(span_v)
            return f"{region.lower} .. {region.upper} ({lo:+g} .. {hi:+g} V at {span_v:g} V)"
    return "whole sweep (end points)" if name == "full" else ""


def show_tables(table: LimitTable, grade: str | None = None) -> list[Table]:
    """Rich tables: regions, then one per grade (or only `grade`), then the bins."""
    regions = Table(title=f"{table.product}: common-mode regions", header_style=HEAD, title_justify="left")
    for column in ("region", "kind", "from", "to", f"VCM at {NOMINAL_SPAN_V:g} V span"):
        regions.add_column(column)
    for r in table.regions:
        regions.add_row(r.name, r.kind, str(r.lower), str(r.upper),
                        f"{r.lower.vcm(NOMINAL_SPAN_V):+g} .. {r.upper.vcm(NOMINAL_SPAN_V):+g} V")
    out = [regions]
    chosen = [table.grade(grade)] if grade else list(table.grades)
    for g in chosen:
        t = Table(title=f"Grade {g.name}: hard bin {g.hard_bin}, soft bin {g.soft_bin}", header_style=HEAD,
                  title_justify="left")
        guarded = any(lim.spec_low is not None or lim.spec_high is not None for lim in g.limits)
        columns = [("parameter", "left"), ("region", "left"), ("low", "right"), ("high", "right")]
        if guarded:   # a guard-banded table: low/high are the acceptance limits
            columns += [("spec low", "right"), ("spec high", "right"), ("guard", "left")]
        for column, justify in (*columns, ("fail soft bin", "right"), ("bin name", "left")):
            t.add_column(column, justify=justify)  # type: ignore[arg-type]
        for lim in g.limits:
            cells = [lim.param, lim.region or "", _limit_cell(lim.low, lim.units), _limit_cell(lim.high, lim.units)]
            if guarded:
                spec_low, spec_high = lim.spec
                u_units = "V/V" if lim.units == "dB" else lim.units   # dB figures are guarded on their slope
                guard = "" if lim.guard_k is None else f"k {lim.guard_k:g}, u {fmt(lim.guard_u, u_units, 3, True)}"
                cells += [_limit_cell(spec_low, lim.units), _limit_cell(spec_high, lim.units), guard]
            t.add_row(*cells, str(lim.soft_bin), lim.bin_name)
        out.append(t)
    bins = Table(title="Bins", header_style=HEAD, title_justify="left")
    for column in ("kind", "bin", "name", "pass"):
        bins.add_column(column)
    for b in table.hard_bins.values():
        bins.add_row("hard", str(b.number), b.name, "yes" if b.passing else "no")
    for b in table.soft_bins.values():
        bins.add_row("soft", str(b.number), b.name, "yes" if b.passing else "no")
    c = table.contact
    bins.add_row("contact", str(c.hard_bin),
                 f"open below {fmt(c.open_below_a, 'A', with_unit=True)} -> soft {c.open_soft_bin}; "
                 f"short above {fmt(c.short_above_a, 'A', with_unit=True)} -> soft {c.short_soft_bin}", "no")
    bins.add_row("tester fault", str(table.tester_fault_hard_bin), f"soft {table.tester_fault_soft_bin}", "no")
    out.append(bins)
    return out


# ---- diff -------------------------------------------------------------------------------------

@dataclass(frozen=True)
class Change:
    kind: str     # added, removed, loosened, tightened, mixed, bin, region, grade, hard bin, contact
    grade: str
    param: str
    region: str
    detail: str


def _side_change(old: float | None, new: float | None, side: str) -> str | None:
    """'loosened'/'tightened' for one side of a window, None if it did not move."""
    if old == new:
        return None
    if new is None:
        return "loosened"  # the side was dropped
    if old is None:
        return "tightened"  # a side that was open now limits
    wider = new < old if side == "low" else new > old
    return "loosened" if wider else "tightened"


def _limit_changes(grade: str, old: Limit, new: Limit) -> list[Change]:
    changes = []
    sides = {s: _side_change(getattr(old, s), getattr(new, s), s) for s in ("low", "high")}
    moved = {s: k for s, k in sides.items() if k}
    if moved:
        kinds = set(moved.values())
        kind = kinds.pop() if len(kinds) == 1 else "mixed"
        detail = "; ".join(f"{s} {_limit_cell(getattr(old, s), old.units) or 'none'} -> "
                           f"{_limit_cell(getattr(new, s), new.units) or 'none'} ({k})" for s, k in moved.items())
        changes.append(Change(kind, grade, old.param, old.region or "", detail))
    if (old.soft_bin, old.bin_name) != (new.soft_bin, new.bin_name):
        changes.append(Change("bin", grade, old.param, old.region or "",
                              f"fail soft bin {old.soft_bin} {old.bin_name!r} -> {new.soft_bin} {new.bin_name!r}"))
    return changes


def _grade_changes(old: Grade, new: Grade) -> list[Change]:
    changes = []
    if (old.hard_bin, old.soft_bin) != (new.hard_bin, new.soft_bin):
        changes.append(Change("bin", old.name, "", "", f"grade bins hard {old.hard_bin}/soft {old.soft_bin} -> "
                                                       f"hard {new.hard_bin}/soft {new.soft_bin}"))
    old_limits = {(lim.param, lim.region): lim for lim in old.limits}
    new_limits = {(lim.param, lim.region): lim for lim in new.limits}
    for key, lim in old_limits.items():
        if key not in new_limits:
            changes.append(Change("removed", old.name, key[0], key[1] or "", f"was {_window(lim)}"))
        else:
            changes += _limit_changes(old.name, lim, new_limits[key])
    for key, lim in new_limits.items():
        if key not in old_limits:
            changes.append(Change("added", old.name, key[0], key[1] or "", _window(lim)))
    return changes


def _window(lim: Limit) -> str:
    low, high = _limit_cell(lim.low, lim.units), _limit_cell(lim.high, lim.units)
    text = f"{low or '-inf'} .. {high or '+inf'}"
    return f"{text}, soft bin {lim.soft_bin}"


def diff_tables(old: LimitTable, new: LimitTable) -> list[Change]:
    """What changed from `old` to `new`: regions, grades, limits per grade/param/region, bins."""
    changes: list[Change] = []
    if old.product != new.product:
        changes.append(Change("product", "", "", "", f"{old.product} -> {new.product}"))
    old_regions = {r.name: r for r in old.regions}
    new_regions = {r.name: r for r in new.regions}
    for name, r in old_regions.items():
        n = new_regions.get(name)
        if n is None:
            changes.append(Change("region", "", "", name, f"removed (was {r.lower} .. {r.upper}, {r.kind})"))
        elif (r.lower, r.upper, r.kind) != (n.lower, n.upper, n.kind):
            changes.append(Change("region", "", "", name, f"{r.lower} .. {r.upper} ({r.kind}) -> "
                                                          f"{n.lower} .. {n.upper} ({n.kind})"))
    for name, n in new_regions.items():
        if name not in old_regions:
            changes.append(Change("region", "", "", name, f"added {n.lower} .. {n.upper} ({n.kind})"))
    old_grades = {g.name: g for g in old.grades}
    new_grades = {g.name: g for g in new.grades}
    for name, g in old_grades.items():
        if name not in new_grades:
            changes.append(Change("grade", name, "", "", "grade removed"))
        else:
            changes += _grade_changes(g, new_grades[name])
    for name in new_grades:
        if name not in old_grades:
            changes.append(Change("grade", name, "", "", f"grade added ({len(new_grades[name].limits)} limits)"))
    if [g.name for g in old.grades if g.name in new_grades] != [g.name for g in new.grades if g.name in old_grades]:
        changes.append(Change("grade", "", "", "", "grade order changed: "
                              f"{', '.join(old_grades)} -> {', '.join(new_grades)}"))
    for number in sorted(set(old.hard_bins) | set(new.hard_bins)):
        a, b = old.hard_bins.get(number), new.hard_bins.get(number)
        if a != b:
            changes.append(Change("hard bin", "", "", "", f"{number}: {_bin(a)} -> {_bin(b)}"))
    if old.fail_hard_bin != new.fail_hard_bin:
        changes.append(Change("hard bin", "", "", "", f"fail hard bin {old.fail_hard_bin} -> {new.fail_hard_bin}"))
    if old.contact != new.contact:
        changes.append(Change("contact", "", "", "", f"{old.contact} -> {new.contact}"))
    if (old.tester_fault_hard_bin, old.tester_fault_soft_bin) != (new.tester_fault_hard_bin, new.tester_fault_soft_bin):
        changes.append(Change("bin", "", "", "", f"tester fault bins {old.tester_fault_hard_bin}/"
                              f"{old.tester_fault_soft_bin} -> {new.tester_fault_hard_bin}/{new.tester_fault_soft_bin}"))
    return changes


def _bin(b: object) -> str:
    if b is None:
        return "none"
    return f"{b.name!r} ({'pass' if b.passing else 'fail'})"  # type: ignore[attr-defined]


def diff_table(changes: list[Change]) -> Table:
    t = Table(title=f"{len(changes)} change(s)", header_style=HEAD, title_justify="left")
    for column in ("change", "grade", "parameter", "region", "detail"):
        t.add_column(column)
    for c in changes:
        t.add_row(c.kind, c.grade, c.param, c.region, c.detail)
    return t




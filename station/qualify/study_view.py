"""The study report on the console (rich tables) and as one self-contained HTML page."""

from __future__ import annotations

import html
import math
import time
from pathlib import Path

import numpy as np
from rich.table import Table

from station import __version__
from station.qualify.study import FigureStudy, StudyReport
from station.review.units import display_unit, fmt

HEAD = "bold"


def _sd(variance: float, units: str) -> str:
    return fmt(math.sqrt(variance), units, 3)


def components_table(report: StudyReport) -> Table:
    table = Table(title="Variance components (standard deviations)", header_style=HEAD, title_justify="left")
    for column in ("figure", "studied as", "unit", "parts", report.appraiser_kind + "s", "repeats",
                   "repeatability", report.appraiser_kind, "interaction", "GRR", "part-to-part", "ndc"):
        table.add_column(column, justify="left" if column in ("figure", "studied as", "unit") else "right")
    for f in report.figures:
        c, a = f.anova.components, f.anova
        table.add_row(f.name, f.studied, display_unit(f.units)[1], str(a.parts), str(a.appraisers), str(a.repeats),
                      _sd(c.repeatability, f.units), _sd(c.appraiser, f.units), _sd(c.interaction, f.units),
                      fmt(c.grr, f.units, 3), fmt(c.pv, f.units, 3), str(c.ndc))
    return table


def verdict_table(report: StudyReport) -> Table:
    table = Table(title="GRR against each grade's limits", header_style=HEAD, title_justify="left")
    for column in ("figure", "grade", "limit (tolerance)", "%GRR", "verdict"):
        table.add_column(column, justify="right" if column == "%GRR" else "left")
    style = {"acceptable": "green", "conditional": "yellow", "not acceptable": "bold red"}
    for f in report.figures:
        for v in f.limits:
            table.add_row(f.name, v.grade, v.tolerance.text, f"{v.pct_grr:.2f} %",
                          f"[{style.get(v.verdict, '')}]{v.verdict}[/]")
    return table


def notes(report: StudyReport) -> list[str]:
    out = []
    for f in report.figures:
        if f.balanced.dropped_parts:
            out.append(f"{f.name}: part(s) {', '.join(f.balanced.dropped_parts)} left out (a measurement "
                       f"missing or over-range in some {report.appraiser_kind}; the ANOVA needs every part "
                       f"{f.balanced.repeats} times in every {report.appraiser_kind})")
        if f.balanced.trimmed_cells:
            out.append(f"{f.name}: {f.balanced.trimmed_cells} cell(s) had more than {f.balanced.repeats} "
                       "values; the first ones kept")
    low_ndc = [f"{f.name} ({f.anova.components.ndc})" for f in report.figures if f.anova.components.ndc < 5]
    if low_ndc:
        out.append("ndc under 5 for " + ", ".join(low_ndc) + ": the study's parts spread less than the "
                   "gauge resolves there; pick parts that span the process, or read %GRR of tolerance only")
    out.extend(f"{name}: no components: {why}" for name, why in report.skipped.items())
    out.append("CMRR, PSRR and AOL are studied on their slope in V/V; a limit 'L dB' is the window "
               "|slope| <= 10^(-L/20), a tolerance of twice that.")
    out.append("%GRR = 6 GRR / tolerance (one-sided limit: 3 GRR / |limit - mean|); under 10 % acceptable, "
               "10-30 % conditional, over 30 % not; ndc = 1.41 PV / GRR (gauge-study practice, from memory).")
    return out


# ---- HTML ------------------------------------------------------------------------------------

def _figure_plot(f: FigureStudy, appraiser_kind: str) -> str:
    from station.review.plots import _axes, to_base64
    from station.review.units import display_unit

    factor, label = display_unit(f.units)
    fig, ax = _axes(7.0, 3.0)
    parts = sorted(f.data["part"].unique())
    appraisers = sorted(f.data["appraiser"].unique())
    width = 0.6 / max(1, len(appraisers))
    for j, appraiser in enumerate(appraisers):
        rows = f.data[f.data["appraiser"] == appraiser]
        x = np.array([parts.index(p) for p in rows["part"]]) + (j - (len(appraisers) - 1) / 2) * width
        ax.plot(x, rows["value"].to_numpy() * factor, "o", ms=3.5, label=appraiser, alpha=0.8)
    ax.set_xticks(range(len(parts)), parts, fontsize=7)
    ax.set_ylabel(f"{f.studied} ({label})")
    ax.set_title(f"{f.name}: measurements by part and {appraiser_kind}", fontsize=10)
    ax.legend(fontsize=7, ncol=4)
    return to_base64(fig)


def _components_plot(f: FigureStudy, appraiser_kind: str) -> str:
    from station.review.plots import BAR, _axes, to_base64
    from station.review.units import display_unit

    factor, label = display_unit(f.units)
    c = f.anova.components
    names = ["repeatability", appraiser_kind, "interaction", "GRR", "part-to-part"]
    values = [math.sqrt(c.repeatability), math.sqrt(c.appraiser), math.sqrt(c.interaction), c.grr, c.pv]
    fig, ax = _axes(4.2, 3.0)
    ax.barh(names[::-1], [v * factor for v in values[::-1]], color=BAR)
    ax.set_xlabel(f"standard deviation ({label})")
    ax.set_title("components", fontsize=10)
    return to_base64(fig)


def _rows_html(rows: list[list[str]], head: list[str]) -> str:
    th = "".join(f"<th>{html.escape(h)}</th>" for h in head)
    body = "".join("<tr>" + "".join(f"<td>{html.escape(c)}</td>" for c in row) + "</tr>" for row in rows)
    return f"<table><tr>{th}</tr>{body}</table>"


def write_study_html(report: StudyReport, path: Path) -> Path:
    parts = ["<!DOCTYPE html><html lang='en'><head><meta charset='utf-8'><title>Station study</title>",
             "<style>body{font-family:'DejaVu Sans',Verdana,sans-serif;margin:24px;background:#f6f5f1;color:#22303c}"
             "table{border-collapse:collapse;font-size:12px;background:#fff;margin:8px 0}"
             "th{background:#dfe6ea;text-align:left;padding:4px 8px}td{padding:3px 8px;border-top:1px solid #e6e6e6}"
             "h2{border-bottom:2px solid #c7a15a;font-size:17px}.note{font-size:12px;color:#5b6770}"
             "img{max-width:100%}.row{display:flex;gap:12px;flex-wrap:wrap}</style></head><body>",
             "<h1>Repeatability and reproducibility study</h1>",
             f"<p class='note'>stations: {html.escape(', '.join(report.stations))}; "
             f"limits: {html.escape(report.table_source or 'none')}; folders: "
             f"{html.escape(', '.join(str(p) for p in report.folders))}</p>"]
    verdict_rows = [[f.name, v.grade, v.tolerance.text, f"{v.pct_grr:.2f} %", v.verdict]
                    for f in report.figures for v in f.limits]
    parts.append("<h2>GRR against each grade's limits</h2>")
    parts.append(_rows_html(verdict_rows, ["figure", "grade", "limit (tolerance)", "%GRR", "verdict"]))
    for f in report.figures:
        c, a = f.anova.components, f.anova
        parts.append(f"<h2>{html.escape(f.name)} (studied as {html.escape(f.studied)})</h2>")
        parts.append(_rows_html([
            ["part", str(a.part.df), f"{a.part.ss:.4g}", f"{a.part.ms:.4g}"],
            [report.appraiser_kind, str(a.appraiser.df), f"{a.appraiser.ss:.4g}", f"{a.appraiser.ms:.4g}"],
            ["interaction", str(a.interaction.df), f"{a.interaction.ss:.4g}", f"{a.interaction.ms:.4g}"],
            ["repeatability", str(a.error.df), f"{a.error.ss:.4g}", f"{a.error.ms:.4g}"],
        ], ["source", "df", "SS", "MS"]))
        parts.append(f"<p class='note'>GRR {fmt(c.grr, f.units, 3, True)}, part-to-part {fmt(c.pv, f.units, 3, True)}, "
                     f"ndc {c.ndc}</p>")
        parts.append("<div class='row'>"
                     f"<img alt='measurements' src='data:image/png;base64,{_figure_plot(f, report.appraiser_kind)}'>"
                     f"<img alt='components' src='data:image/png;base64,{_components_plot(f, report.appraiser_kind)}'>"
                     "</div>")
    parts.extend(f"<p class='note'>note: {html.escape(n)}</p>" for n in notes(report))
    parts.append(f"<p class='note'>Generated {time.strftime('%Y-%m-%d %H:%M:%S UTC', time.gmtime())} "
                 f"by ampscreen-station {__version__}.</p></body></html>")
    path.write_text("".join(parts), encoding="utf-8")
    return path

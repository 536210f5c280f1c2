"""The end-of-shift report as one self-contained HTML file (plots inlined as base64 PNG).

Opens in any browser with no network and no other files: lot header, yield, bin Pareto,
yield by site and by hour, a histogram per parameter and region with each grade's limits,
Vos-versus-common-mode curves of a sample of parts with the regions shaded, and CMRR versus
frequency per grade with its limits where the lot measured it (ac_cmrr).
"""

from __future__ import annotations

import math
from dataclasses import dataclass, field
from datetime import UTC, datetime
from pathlib import Path

import jinja2
import numpy as np
import pandas as pd

from station import __version__
from station.config.limit_tables import LimitTable
from station.config.parameters import LIMITABLE
from station.review.ac_curves import COLUMNS as AC_COLUMNS
from station.review.ac_curves import cmrr_by_frequency
from station.review.limits import limits_in_force
from station.review.load import Datalogs
from station.review.plots import (
    cmrr_frequency_plot,
    histogram,
    histogram_bin_count,
    pareto_plot,
    vos_curves,
    yield_bars,
)
from station.review.summary import Summary, group_key, yield_by
from station.review.units import display_unit, fmt, fmt_share

CURVE_SAMPLE = 30
CURVE_SEED = 401

_TEMPLATE = jinja2.Template("""<!DOCTYPE html>
<html lang="en"><head><meta charset="utf-8">
<title>Shift review: {{ title }}</title>
<style>
 body { font-family: "DejaVu Sans", Verdana, sans-serif; margin: 0; background: #f6f5f1; color: #22303c; }
 header { background: #22303c; color: #f6f5f1; padding: 18px 28px; }
 header h1 { margin: 0 0 4px 0; font-size: 22px; letter-spacing: 0.5px; }
 header p { margin: 0; color: #c9d3da; font-size: 13px; }
 main { padding: 10px 28px 40px 28px; max-width: 1200px; }
 h2 { border-bottom: 2px solid #c7a15a; padding-bottom: 3px; font-size: 17px; margin-top: 28px; }
 table { border-collapse: collapse; font-size: 12px; margin: 8px 0; background: #ffffff; }
 th { background: #dfe6ea; text-align: left; padding: 4px 8px; }
 td { padding: 3px 8px; border-top: 1px solid #e6e6e6; }
 td.n { text-align: right; font-variant-numeric: tabular-nums; }
 .cards { display: flex; flex-wrap: wrap; gap: 10px; margin: 12px 0; }
 .card { background: #ffffff; border-left: 4px solid #3f7d6e; padding: 8px 14px; min-width: 130px; }
 .card b { display: block; font-size: 20px; }
 .card span { font-size: 11px; color: #5b6770; }
 .grid { display: flex; flex-wrap: wrap; gap: 14px; }
 figure { background: #ffffff; margin: 0; padding: 8px; border: 1px solid #e1ddd3; }
 figure img { display: block; max-width: 100%; }
 figcaption { font-size: 12px; color: #44525c; padding-top: 4px; }
 .flag { color: #a4471f; font-weight: bold; }
 .note { font-size: 12px; color: #5b6770; }
</style></head>
<body>
<header><h1>Shift review: {{ title }}</h1>
<p>{{ subtitle }}</p></header>
<main>
<h2>Lot header</h2>
<table>{% for k, v in header %}<tr><th>{{ k }}</th><td>{{ v }}</td></tr>{% endfor %}</table>
{% if instruments %}<table><tr><th>role</th><th>instrument (*IDN?)</th></tr>
{% for k, v in instruments %}<tr><td>{{ k }}</td><td>{{ v }}</td></tr>{% endfor %}</table>{% endif %}

<h2>Yield</h2>
<div class="cards">{% for k, v in cards %}<div class="card"><b>{{ v }}</b><span>{{ k }}</span></div>{% endfor %}</div>
{{ grades }}
<p class="note">Yield = good / (good + failed); tester faults carry no pass/fail and are left out.
Bin shares are of all parts tested.</p>

<h2>Bins</h2>
<div class="grid"><div>{{ hard_bins }}</div><div>{{ soft_bins }}</div></div>
{{ figure(pareto) }}

<h2>Sites and time</h2>
{{ sites }}
<p class="{{ 'flag' if site_flag else 'note' }}">{{ site_test }}</p>
<div class="grid">{{ figure(site_plot) }}{{ figure(hour_plot) }}</div>

<h2>Parameter distributions</h2>
<p class="note">Over-range (non-finite) results are counted but left out of mean, sigma and the plots.
Dashed lines: limits of each grade. Cpk = min(USL - mu, mu - LSL) / (3 sigma).</p>
{{ stats }}
{{ cpk }}
<div class="grid">{% for h in histograms %}{{ figure(h) }}{% endfor %}</div>

<h2>Offset versus common mode</h2>
{{ figure(curves) }}
{% if ac_cmrr %}<h2>Common-mode rejection versus frequency</h2>
<p class="note">Per grade: median CMRR at each frequency point and the band of the middle 80 % of parts;
triangles: the grade's CMRR limits at their frequency.</p>
{{ figure(ac_cmrr) }}{% endif %}
{% for n in notes %}<p class="note">note: {{ n }}</p>{% endfor %}
<p class="note">Generated {{ generated }} by ampscreen-station {{ version }} from {{ folders }}.</p>
</main></body></html>
""", autoescape=True)


def _figure(item: tuple[str, str] | None) -> str:
    if item is None:
        return ""
    title, data = item
    safe = jinja2.filters.escape(title)
    return jinja2.utils.markupsafe.Markup(
        f'<figure><img alt="{safe}" src="data:image/png;base64,{data}"><figcaption>{safe}</figcaption></figure>')


def _html_table(frame: pd.DataFrame, formats: dict[str, object] | None = None) -> str:
    formats = formats or {}
    head = "".join(f"<th>{jinja2.filters.escape(str(c))}</th>" for c in frame.columns)
    rows = []
    for values in frame.itertuples(index=False):
        cells = []
        for column, value in zip(frame.columns, values, strict=True):
            formatter = formats.get(column)
            text = formatter(value) if callable(formatter) else _plain(value)
            numeric = isinstance(value, int | float | np.integer | np.floating) and not isinstance(value, bool)
            cells.append(f'<td class="{"n" if numeric else ""}">{jinja2.filters.escape(text)}</td>')
        rows.append("<tr>" + "".join(cells) + "</tr>")
    return jinja2.utils.markupsafe.Markup(f"<table><tr>{head}</tr>{''.join(rows)}</table>")


def _plain(value: object) -> str:
    if isinstance(value, float | np.floating):
        return "" if math.isnan(value) else f"{value:.4g}"
    if isinstance(value, bool | np.bool_):
        return "yes" if value else "no"
    return str(value)


@dataclass
class ReportData:
    """What the report draws besides the Summary: from datalog folders (`folder_report_data`)
    or counted by a database (station/store/report_sql.py)."""

    lots: list[dict]                     # lot.json headers; the first is described
    source: str                          # where the data came from, for the footer
    hour_table: pd.DataFrame             # yield by hour (summary.yield_by's columns)
    limits: pd.DataFrame                 # GRADE, PARAM, REGION, LSL, USL: lines on the histograms
    histograms: dict[tuple[str, str], tuple[np.ndarray, np.ndarray]]   # (param, region) -> counts, edges
    curves: dict[int, tuple[np.ndarray, np.ndarray]]                   # a sample of parts: VCM, Vos
    curve_parts: int                     # parts with a curve, of which `curves` is the sample
    regions: dict[str, tuple[float, float]]                            # name -> VCM range, shaded
    # CMRR versus frequency per grade (review/ac_curves.py); empty where the lot has no ac_cmrr
    ac_cmrr: pd.DataFrame = field(default_factory=lambda: pd.DataFrame(columns=AC_COLUMNS))


def write_report(logs: Datalogs, summary: Summary, path: str | Path) -> Path:
    """The report of datalog folders."""
    return render_report(folder_report_data(logs, summary), summary, path)


def render_report(data: ReportData, summary: Summary, path: str | Path) -> Path:
    lot = data.lots[0] if data.lots else {}
    title = ", ".join(sorted({str(x.get("lot_id", "?")) for x in data.lots})) or "no lot"
    subtitle = f"{lot.get('product', '?')} on {lot.get('station', '?')}, {len(data.lots)} datalog(s), " \
               f"{summary.overview['parts tested']} parts tested"
    html = _TEMPLATE.render(
        title=title, subtitle=subtitle, header=_header(data.lots), instruments=list((lot.get("instruments") or {}).items()),
        cards=_cards(summary), grades=_html_table(summary.grades, {"share": fmt_share}),
        hard_bins=_html_table(summary.hard_bins, {"share": fmt_share}),
        soft_bins=_html_table(summary.soft_bins, {"share": fmt_share}),
        pareto=("Failure Pareto by soft bin", pareto_plot(summary.pareto)),
        sites=_html_table(summary.sites, {"yield": fmt_share, "p_vs_rest": lambda v: _plain(v)}),
        site_test=f"Site difference: {summary.site_test.describe()}", site_flag=summary.site_test.flagged,
        site_plot=("Yield by site", yield_bars(summary.sites, "site", "Yield by site")),
        hour_plot=("Yield by hour (UTC)", yield_bars(data.hour_table, "hour", "Yield by hour (UTC)")),
        stats=_stats_table(summary), cpk=_cpk_table(summary), histograms=_histograms(data, summary),
        curves=_curves(data), ac_cmrr=_ac_cmrr(data), notes=summary.notes + [f"limits for Cpk and plots: {summary.limits_source}"],
        generated=datetime.now(UTC).strftime("%Y-%m-%d %H:%M UTC"), version=__version__,
        folders=data.source, figure=_figure)
    target = Path(path)
    target.write_text(html, encoding="utf-8")
    return target


def folder_report_data(logs: Datalogs, summary: Summary) -> ReportData:
    limits, _, table = limits_in_force(logs)
    results = logs.results
    rows = results[results["PARAM"].isin(list(LIMITABLE))]
    histograms = {}
    for key, frame in rows.groupby([rows["PARAM"].astype(str), rows["REGION"].astype(str)]):
        values = frame["RESULT"].to_numpy()
        finite = values[np.isfinite(values)]
        counts, edges = np.histogram(finite, bins=histogram_bin_count(len(finite)))
        histograms[(str(key[0]), str(key[1]))] = (counts, edges)
    raw = results[results["PARAM"] == "vos_cm"]
    curves: dict[int, tuple[np.ndarray, np.ndarray]] = {}
    parts = raw["PART_SEQ"].unique()
    if len(parts):
        rng = np.random.default_rng(CURVE_SEED)
        chosen = set(rng.choice(parts, size=min(CURVE_SAMPLE, len(parts)), replace=False).tolist())
        sample = raw[raw["PART_SEQ"].isin(chosen)]
        curves = {int(seq): (g["VCM"].to_numpy(), g["RESULT"].to_numpy()) for seq, g in sample.groupby("PART_SEQ")}
    return ReportData(
        lots=logs.lots, source=", ".join(str(f) for f in logs.folders),
        hour_table=yield_by(logs.parts, group_key(logs, "hour"), "hour", summary.grade_order),
        limits=limits, histograms=histograms, curves=curves, curve_parts=len(parts),
        regions=region_ranges(table, logs.lots[0].get("span_v")),
        ac_cmrr=cmrr_by_frequency(results, logs.parts))


def region_ranges(table: LimitTable | None, span: object) -> dict[str, tuple[float, float]]:
    """The common-mode regions of a limit table over the lot's span (none without either)."""
    if table is None or not isinstance(span, int | float):
        return {}
    return {r.name: r.vcm_range(float(span)) for r in table.regions}


def _header(lots: list[dict]) -> list[tuple[str, str]]:
    lot = lots[0] if lots else {}
    rows = [(k, str(lot.get(k, ""))) for k in ("lot_id", "product", "station", "operator", "mode",
                                               "start_time", "end_time", "sites", "span_v")]
    for key, label in (("sequence", "program (sequence)"), ("limits", "limit table"), ("bench", "bench")):
        info = lot.get(key) or {}
        rows.append((label, f"{info.get('source', '')}  sha256 {info.get('sha256', '')}"))
    software = lot.get("software") or {}
    rows.append(("software", f"{software.get('name', '')} {software.get('version', '')}"))
    if len(lots) > 1:
        rows.append(("other lots", ", ".join(str(x.get("lot_id")) for x in lots[1:])))
    return rows


def _cards(summary: Summary) -> list[tuple[str, str]]:
    o = summary.overview
    cards = [("parts tested", str(o["parts tested"])), ("yield", fmt_share(float(o["yield"]))),
             ("final yield", fmt_share(float(o["final yield"])))]
    cards += [(f"grade {r.grade}", fmt_share(r.share)) for r in summary.grades.itertuples()]
    cards += [("tester faults", str(o["tester faults"])), ("retests", str(o["retests"])),
              ("parts per hour", _plain(float(o["parts per hour"])))]
    return cards


def _stats_table(summary: Summary) -> str:
    frame = summary.stats.copy()
    for column in ("mean", "sigma", "min", "p1", "p50", "p99", "max"):
        frame[column] = [fmt(v, u) for v, u in zip(frame[column], frame["units"], strict=True)]
    frame["units"] = [display_unit(u)[1] for u in frame["units"]]
    return _html_table(frame)


def _cpk_table(summary: Summary) -> str:
    frame = summary.cpk.copy()
    unit = [str(u) for u in frame.pop("units")]   # V/V where a rejection figure is judged on its slope
    for column in ("lsl", "usl", "mean", "sigma"):
        frame[column] = [fmt(v, u) for v, u in zip(frame[column], unit, strict=True)]
    frame.insert(3, "unit", [display_unit(u)[1] for u in unit])
    return _html_table(frame, {"cpk": lambda v: _plain(v)})


def _histograms(data: ReportData, summary: Summary) -> list[tuple[str, str]]:
    limits = data.limits
    plots = []
    for stat in summary.stats.itertuples():
        if stat.param not in LIMITABLE or (stat.param, stat.region) not in data.histograms:
            continue
        counts, edges = data.histograms[(stat.param, stat.region)]
        own = limits[(limits["PARAM"] == stat.param) & (limits["REGION"] == stat.region)]
        title = f"{stat.param} {stat.region}".strip()
        plots.append((f"Histogram: {title}", histogram(counts, edges, stat.units, title, own, int(stat.over_range))))
    return plots


def _curves(data: ReportData) -> tuple[str, str] | None:
    if not data.curves:
        return None
    title = f"Vos versus common mode, {len(data.curves)} of {data.curve_parts} parts"
    return title, vos_curves(data.curves, data.regions, title)


def _ac_cmrr(data: ReportData) -> tuple[str, str] | None:
    if data.ac_cmrr.empty:
        return None
    title = "CMRR versus frequency per grade (difference amplifier)"
    return title, cmrr_frequency_plot(data.ac_cmrr, data.limits, title)

"""The review report's plots: matplotlib (Agg) figures returned as base64 PNG text."""

from __future__ import annotations

import base64
import io

import matplotlib

matplotlib.use("Agg")

import matplotlib.pyplot as plt  # noqa: E402
import numpy as np  # noqa: E402
import pandas as pd  # noqa: E402

from station.judge.ac_rejection import label_frequency  # noqa: E402
from station.review.units import display_unit  # noqa: E402

# Our own palette: slate bars, one distinct colour per grade, soft tints per region.
BAR = "#4f6d8f"
LINE = "#b5523b"
GRADE_COLOURS = ["#1f8a70", "#d08c1a", "#7a4fa0", "#c0392b", "#2c7fb8"]
REGION_TINTS = ["#dce9f5", "#f8e3c6", "#dff0dc", "#eadcf2", "#f3dada"]
DPI = 90


def to_base64(fig: plt.Figure) -> str:
    buffer = io.BytesIO()
    fig.savefig(buffer, format="png", dpi=DPI, bbox_inches="tight")
    plt.close(fig)
    return base64.b64encode(buffer.getvalue()).decode("ascii")


def _axes(width: float = 7.0, height: float = 3.2) -> tuple[plt.Figure, plt.Axes]:
    fig, ax = plt.subplots(figsize=(width, height))
    ax.grid(True, color="#e4e4e4", linewidth=0.6)
    ax.set_axisbelow(True)
    for side in ("top", "right"):
        ax.spines[side].set_visible(False)
    return fig, ax


def pareto_plot(pareto: pd.DataFrame) -> str:
    fig, ax = _axes()
    if pareto.empty:
        ax.text(0.5, 0.5, "no failures", ha="center", va="center", transform=ax.transAxes)
    else:
        labels = [f"{b}\n{n[:18]}" for b, n in zip(pareto["bin"], pareto["name"], strict=True)]
        ax.bar(range(len(pareto)), pareto["count"], color=BAR)
        ax.set_xticks(range(len(pareto)), labels, fontsize=7)
        ax.set_ylabel("parts")
        cumulative = ax.twinx()
        cumulative.plot(range(len(pareto)), 100 * pareto["cumulative"], color=LINE, marker="o")
        cumulative.set_ylim(0, 105)
        cumulative.set_ylabel("cumulative %")
    ax.set_title("Failure Pareto by soft bin")
    return to_base64(fig)


def yield_bars(frame: pd.DataFrame, key: str, title: str) -> str:
    fig, ax = _axes()
    labels = frame[key].astype(str).tolist()
    values = 100 * frame["yield"].fillna(0).to_numpy()
    ax.bar(range(len(labels)), values, color=BAR)
    ax.set_xticks(range(len(labels)), labels, fontsize=8, rotation=30 if len(labels) > 6 else 0)
    low = max(0.0, float(values.min()) - 10) if len(values) else 0.0
    ax.set_ylim(low, 100.5)
    ax.set_ylabel("yield %")
    for x, v in enumerate(values):
        ax.text(x, v, f"{v:.1f}", ha="center", va="bottom", fontsize=7)
    ax.set_title(title)
    return to_base64(fig)


def histogram_bin_count(finite: int) -> int:
    """Bars of a histogram of `finite` values: the square-root rule, kept between 10 and 60."""
    return min(60, max(10, int(np.sqrt(finite))))


def histogram(counts: np.ndarray, edges: np.ndarray, units: str, title: str, limits: pd.DataFrame,
              over_range: int) -> str:
    """Histogram (counts per bar between `edges`, as numpy.histogram gives them) with each
    grade's LSL/USL as vertical lines. Counts rather than values, so that a database can count."""
    factor, label = display_unit(units)
    fig, ax = _axes(6.0, 2.8)
    if len(counts) and counts.sum():
        ax.stairs(counts, edges * factor, fill=True, color=BAR, alpha=0.85)
    for i, row in enumerate(limits.itertuples()):
        colour = GRADE_COLOURS[i % len(GRADE_COLOURS)]
        for side, value in (("LSL", row.LSL), ("USL", row.USL)):
            if np.isfinite(value):
                ax.axvline(value * factor, color=colour, linestyle="--", linewidth=1.4,
                           label=f"{row.GRADE} {side} {value * factor:g} {label}")
    if len(limits):
        ax.legend(fontsize=7, loc="upper right", frameon=False)
    ax.set_xlabel(label)
    ax.set_ylabel("parts")
    note = f" ({over_range} over-range not shown)" if over_range else ""
    ax.set_title(title + note, fontsize=10)
    return to_base64(fig)


def vos_curves(curves: dict[int, tuple[np.ndarray, np.ndarray]], regions: dict[str, tuple[float, float]],
               title: str) -> str:
    """Vos versus VCM for a sample of parts, the common-mode regions shaded."""
    fig, ax = _axes(7.5, 3.8)
    for i, (name, (lo, hi)) in enumerate(regions.items()):
        ax.axvspan(lo, hi, color=REGION_TINTS[i % len(REGION_TINTS)], alpha=0.9, linewidth=0)
        ax.text((lo + hi) / 2, 1.0, name, transform=ax.get_xaxis_transform(), ha="center", va="bottom",
                fontsize=8, color="#333333")
    for vcm, vos in curves.values():
        order = np.argsort(vcm)
        finite = np.isfinite(vos[order])
        ax.plot(vcm[order][finite], 1e6 * vos[order][finite], color=BAR, alpha=0.45, linewidth=0.9, marker=".",
                markersize=3)
    ax.set_xlabel("VCM relative to the supply mid-point (V)")
    ax.set_ylabel("Vos (uV)")
    ax.set_title(title, pad=16)
    return to_base64(fig)


def cmrr_frequency_plot(curves: pd.DataFrame, limits: pd.DataFrame, title: str) -> str:
    """CMRR(f) per grade on a log frequency axis: the median line and the 10-90 % band, and each
    grade's cmrr_ac lower limits as triangles of its colour (curves: review/ac_curves.py)."""
    fig, ax = _axes(7.5, 3.8)
    ax.set_xscale("log")
    grades = list(dict.fromkeys(curves["GRADE"].tolist()))
    for i, grade in enumerate(grades):
        colour = GRADE_COLOURS[i % len(GRADE_COLOURS)]
        own = curves[curves["GRADE"] == grade].sort_values("FREQ_HZ")
        parts = int(own["PARTS"].max()) if len(own) else 0
        ax.fill_between(own["FREQ_HZ"], own["P10"], own["P90"], color=colour, alpha=0.15, linewidth=0)
        ax.plot(own["FREQ_HZ"], own["P50"], color=colour, marker=".", label=f"grade {grade} median ({parts} parts)")
        mine = limits[(limits["GRADE"].astype(str) == grade) & (limits["PARAM"] == "cmrr_ac")]
        if len(mine):
            ax.scatter([label_frequency(r) for r in mine["REGION"]], mine["LSL"], marker="^", color=colour,
                       s=60, zorder=3, label=f"grade {grade} limit")
    ax.set_xlabel("frequency (Hz)")
    ax.set_ylabel("CMRR (dB)")
    ax.set_title(title, fontsize=10)
    ax.legend(fontsize=7, loc="lower left")
    return to_base64(fig)

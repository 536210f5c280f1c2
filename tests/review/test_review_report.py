"""The HTML report: one self-contained file with the expected plots; renders in a headless browser."""

from __future__ import annotations

import re
import shutil
import subprocess
from pathlib import Path

import pytest

from station.config.parameters import LIMITABLE  # noqa: E402
from station.review.load import load_datalogs  # noqa: E402
from station.review.report import write_report  # noqa: E402
from station.review.summary import summarise  # noqa: E402
from tests.support.review_datalogs import LotSpec, make_datalog  # noqa: E402


@pytest.fixture(scope="module")
def report(tmp_path_factory) -> Path:
    base = tmp_path_factory.mktemp("report")
    folder = make_datalog(base / "lot", LotSpec(parts=160, sites=4, seed=31))
    logs = load_datalogs([folder])
    return write_report(logs, summarise(logs), base / "report.html")


def test_single_file_with_every_plot_inlined(report: Path) -> None:
    html = report.read_text()
    images = re.findall(r'<img alt="([^"]*)" src="([^"]{0,30})', html)
    titles = [title for title, _ in images]
    assert all(src.startswith("data:image/png;base64,") for _, src in images)  # data: URL, RFC 2397
    assert "Failure Pareto by soft bin" in titles
    assert "Yield by site" in titles
    assert "Yield by hour (UTC)" in titles
    assert any(t.startswith("Vos versus common mode") for t in titles)
    histograms = [t for t in titles if t.startswith("Histogram: ")]
    # One per limitable parameter and region logged: iq, vos, aol, psrr, cmrr low/high/full,
    # cm_step and vos_worst in the transition, and the bias currents Ib+, Ib-, Ib and Ios.
    assert sorted(histograms) == sorted(f"Histogram: {p}" for p in [
        "aol", "cm_step transition", "cmrr full", "cmrr high", "cmrr low", "iq", "psrr", "vos",
        "vos_worst transition", "ib", "ib_minus", "ib_plus", "ios"])
    assert {t.split()[1] for t in histograms} <= LIMITABLE
    assert len(images) == 4 + len(histograms)
    # Self-contained: nothing fetched from anywhere.
    assert not re.search(r'(src|href)="(?!data:)', html)
    assert "<script" not in html


def test_header_carries_lot_hashes_and_instruments(report: Path) -> None:
    html = report.read_text()
    assert "LOT-T1" in html and "PX-401" in html
    assert "AMPSCREEN-SIM,ASP-2215,0001,1.0" in html
    assert re.search(r"sha256 [0-9a-f]{64}", html)


@pytest.mark.skipif(shutil.which("chromium") is None, reason="chromium is not installed (apt-get install chromium)")
def test_renders_in_headless_chromium(report: Path, tmp_path: Path) -> None:
    png = tmp_path / "report.png"
    command = ["chromium", "--headless", "--no-sandbox", "--disable-gpu", "--no-first-run",
               "--disable-background-networking", "--disable-component-update", "--disable-sync",
               f"--user-data-dir={tmp_path / 'profile'}", f"--screenshot={png}", "--window-size=1280,2000",
               report.resolve().as_uri()]
    subprocess.run(command, capture_output=True, timeout=120, check=False)
    assert png.is_file()
    data = png.read_bytes()
    # PNG specification (W3C, 2nd edition; ISO/IEC 15948:2004): the 8-byte signature (5.2), then
    # the IHDR chunk whose width and height are big-endian 4-byte integers at bytes 16-24 (11.2.2).
    assert data[:8] == b"\x89PNG\r\n\x1a\n"
    width, height = int.from_bytes(data[16:20], "big"), int.from_bytes(data[20:24], "big")
    assert (width, height) == (1280, 2000)
    # A blank page compresses to a few kB (from memory); the report is far richer.
    assert len(data) > 50_000

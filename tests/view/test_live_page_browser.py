"""A person's view of the live page: headless Chromium opens the page of a running dry run and
the counts it renders, after live updates, are those of parts.csv at that moment."""

from __future__ import annotations

import csv
import io
import os
import re
import subprocess
import sys
import time
from collections import Counter
from pathlib import Path

import pytest

from tests.support.cdp_browser import Browser, chromium_missing

pytestmark = pytest.mark.skipif(chromium_missing() is not None, reason=str(chromium_missing()))

# What the page shows, read from the rendered DOM (text, as a person reads it).
READ_DOM = """(() => {
  const text = (id) => document.getElementById(id).textContent.trim();
  const bins = {};
  for (const n of document.querySelectorAll('[data-bin-count]')) bins[n.dataset.binCount] = Number(n.textContent);
  const sites = {};
  for (const n of document.querySelectorAll('[data-site-tested]')) sites[n.dataset.siteTested] = Number(n.textContent);
  return {tested: Number(text('tested')), good: Number(text('good')), failed: Number(text('failed')),
          faults: Number(text('faults')), yield: text('yield'), state: text('state-label'),
          lot: text('lot-id'), link: text('link'), bins, sites,
          generated: document.body.dataset.generated};
})()"""


def counts_of(rows: list[dict[str, str]]) -> dict:
    """The same counts from parts.csv rows, counted with csv and Counter only."""
    good = sum(r["PASS"] == "1" for r in rows)
    failed = sum(r["PASS"] == "0" for r in rows)
    return {"tested": len(rows), "good": good, "failed": failed, "faults": sum(r["PASS"] == "" for r in rows),
            "bins": dict(Counter(r["HARD_BIN"] for r in rows)),
            "sites": dict(Counter(r["SITE_NUM"] for r in rows)),
            "yield": f"{100 * good / (good + failed):.1f} %" if good + failed else "-"}


def parts_rows(folder: Path) -> list[dict[str, str]]:
    text = (folder / "parts.csv").read_text()
    whole = text[: text.rfind("\n") + 1]          # a row being written is not there yet
    return list(csv.DictReader(io.StringIO(whole)))


def shown(dom: dict) -> dict:
    return {"tested": dom["tested"], "good": dom["good"], "failed": dom["failed"], "faults": dom["faults"],
            "bins": {k: v for k, v in dom["bins"].items() if v}, "sites": {k: v for k, v in dom["sites"].items()},
            "yield": dom["yield"]}


def test_the_page_of_a_running_dry_run_shows_parts_csv(tmp_path: Path) -> None:
    out = tmp_path / "lot"
    parts = 32
    station = subprocess.Popen(
        [sys.executable, "-m", "station.cli.main", "dry-run", "--parts", str(parts), "--speed", "2",
         "--lot", "LIVE-T1", "--out", str(out), "--view", "0"],
        stdout=subprocess.PIPE, stderr=subprocess.STDOUT, text=True)
    browser = None
    try:
        assert station.stdout is not None
        url = None
        for _ in range(20):
            line = station.stdout.readline()
            match = re.search(r"live page: (http://127\.0\.0\.1:\d+/)", line)
            if match:
                url = match[1]
                break
        assert url, "the dry run printed no live page address"
        browser = Browser(tmp_path / "profile")
        browser.open(url)
        browser.wait_for("document.body.dataset.generated", timeout=60)
        # Live updates: the rendered counts move while the lot runs, and each time they are
        # those of the first rows of parts.csv (the snapshot's moment; the file may be ahead).
        readings: list[dict] = []
        deadline = time.monotonic() + 120
        while time.monotonic() < deadline:
            dom = browser.evaluate(READ_DOM)
            rows = parts_rows(out)
            if dom["lot"] == "LIVE-T1" and 0 < dom["tested"] < parts and (
                    not readings or dom["tested"] > readings[-1]["tested"]):
                assert dom["tested"] <= len(rows)
                assert shown(dom) == counts_of(rows[: dom["tested"]])
                assert dom["state"] in ("TESTING", "TESTER FAULT") and dom["link"] == "LIVE", (dom, len(rows))
                readings.append(dom)
                if len(readings) == 2:
                    browser.screenshot(tmp_path / "live-page.png")
            if dom["state"] == "SAFE STATE":
                break
            time.sleep(0.2)
        assert len(readings) >= 2, f"fewer than two live updates seen: {readings}"
        # The lot's end reaches the page before the server stops: the whole of parts.csv.
        final = browser.wait_for(f"(() => {{ const d = {READ_DOM}; return d.state === 'SAFE STATE' && d; }})()",
                                 timeout=60)
        rows = parts_rows(out)
        assert len(rows) >= parts
        assert shown(final) == counts_of(rows)
        station.wait(timeout=60)
        assert station.returncode == 0
        # Once the station has gone, the page says so in words.
        lost = browser.wait_for("document.getElementById('link').textContent === 'CONNECTION LOST'"
                                " && document.getElementById('state-label').textContent", timeout=30)
        assert lost == "NO CONNECTION"
    finally:
        if browser is not None:
            browser.close()
        if station.poll() is None:
            station.terminate()
            station.wait(timeout=30)
    png = tmp_path / "live-page.png"
    data = png.read_bytes()
    assert data[:8] == b"\x89PNG\r\n\x1a\n"
    assert (int.from_bytes(data[16:20], "big"), int.from_bytes(data[20:24], "big")) == (1920, 1080)
    assert len(data) > 60_000          # a blank page compresses to a few kB
    keep = os.environ.get("STATION_SCREENSHOT_DIR")
    if keep:                           # for a person to look at: where they asked for it
        Path(keep, "live-page.png").write_bytes(data)
    print(f"screenshot of the live page: {png}")

"""`station run` against `station sim serve` in another process bins like a dry run of the same seed."""

from __future__ import annotations

import subprocess
import sys
import time

import pandas as pd
from click.testing import CliRunner

from station.cli.main import DEMO_LIMITS, DEMO_SEQUENCE, main

SEED, PARTS, SITES, SPEED = 5, 8, 2, "10"


def _serve(tmp_path):
    bench = tmp_path / "bench.yaml"
    process = subprocess.Popen(
        [sys.executable, "-m", "station.cli", "sim", "serve", "--seed", str(SEED), "--parts", str(PARTS),
         "--sites", str(SITES), "--speed", SPEED, "--write-bench", str(bench)],
        stdout=subprocess.PIPE, stderr=subprocess.PIPE, text=True)
    deadline = time.monotonic() + 30
    while not bench.exists() and time.monotonic() < deadline:
        assert process.poll() is None, process.stderr.read()
        time.sleep(0.1)
    assert bench.exists()
    time.sleep(0.2)  # the file is written once; let the writer close it
    return process, bench


def test_served_bench_prints_roles_and_run_matches_dry_run(tmp_path) -> None:
    process, bench = _serve(tmp_path)
    try:
        run = CliRunner().invoke(main, ["run", "--bench", str(bench), "--sequence", str(DEMO_SEQUENCE),
                                        "--limits", str(DEMO_LIMITS), "--lot", "R-1", "--operator", "t",
                                        "--out", str(tmp_path / "run")])
        assert run.exit_code == 0, run.output
    finally:
        process.terminate()
        out, _ = process.communicate(timeout=20)
    lines = [line.split() for line in out.splitlines() if line.strip()]
    roles = {parts[0] for parts in lines if len(parts) == 2 and parts[1].startswith("TCPIP0::127.0.0.1::")}
    assert roles >= {"supply", "force", "dmm1", "dmm2", "switch", "handler"}
    dry = CliRunner().invoke(main, ["dry-run", "--seed", str(SEED), "--parts", str(PARTS), "--sites", str(SITES),
                                    "--speed", SPEED, "--out", str(tmp_path / "dry"), "--lot", "R-1"])
    assert dry.exit_code == 0, dry.output
    columns = ["PART_ID", "SITE_NUM", "HARD_BIN", "SOFT_BIN"]
    ran = pd.read_csv(tmp_path / "run" / "parts.csv")[columns].sort_values("PART_ID").reset_index(drop=True)
    dried = pd.read_csv(tmp_path / "dry" / "parts.csv")[columns].sort_values("PART_ID").reset_index(drop=True)
    pd.testing.assert_frame_equal(ran, dried)
    assert len(ran) == PARTS

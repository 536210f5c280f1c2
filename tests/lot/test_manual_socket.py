"""A manual socket (no handler in the bench config), tried on the simulated bench.

The operator types each part's id at the prompt; the simulated fixture then seats the next
part of its lot under that id (SIM:SEAT), refused while the site is powered. The live
progress bar stops while the station asks, so a prompt never shares a line with the bar.
"""

from __future__ import annotations

import csv
import subprocess
import sys
from pathlib import Path

import pytest
import pyvisa

from sim_instruments.bench import SimBench, SimSettings


def _rows(path: Path) -> list[dict[str, str]]:
    with open(path, newline="", encoding="utf-8") as handle:
        return list(csv.DictReader(handle))


def test_manual_dry_run_tests_the_parts_the_operator_seats(tmp_path: Path) -> None:
    out = tmp_path / "manual"
    run = subprocess.run(
        [sys.executable, "-m", "station.cli", "dry-run", "--manual", "--sites", "2", "--parts", "6",
         "--seed", "3", "--speed", "20", "--out", str(out), "--lot", "MAN-1"],
        input="U1\nU2\nU3\n-\n\n", capture_output=True, text=True, timeout=180)
    assert run.returncode == 0, run.stdout + run.stderr
    parts = _rows(out / "parts.csv")
    assert [(p["PART_ID"], p["SITE_NUM"]) for p in parts] == [("U1", "1"), ("U2", "2"), ("U3", "1")]
    # The simulator's truth names the typed ids; seated by hand, its parts are contacted and
    # measured (before, a manual socket on the simulator read every part as an open).
    truth = {row["PART_ID"]: row for row in _rows(out / "sim_truth.csv")}
    assert {p["PART_ID"] for p in parts} <= set(truth)
    for part in parts:
        good = truth[part["PART_ID"]]["DEFECT"] == "none"
        assert (part["HARD_BIN"] == "1") == good, (part, truth[part["PART_ID"]]["DEFECT"])
    assert any(truth[p["PART_ID"]]["DEFECT"] == "none" for p in parts)
    # Every prompt starts a line of its own: the bar was stopped before asking.
    for line in run.stdout.splitlines():
        if "Seat a part in site" in line:
            assert line.startswith("Seat a part in site"), line
            # The operator is told the site is unpowered and reminded of ESD handling.
            assert "site unpowered; ESD: wrist strap on" in line, line


@pytest.fixture()
def sim() -> SimBench:
    with SimBench(SimSettings(seed=3, sites=2, parts=4)) as bench:
        bench.start()
        yield bench


def test_simulated_socket_refuses_a_seat_while_the_site_is_powered(sim: SimBench) -> None:
    manager = pyvisa.ResourceManager("@py")
    res = {role: manager.open_resource(sim.resources[role], read_termination="\n",
                                       write_termination="\n", timeout=5000)
           for role in ("handler", "supply", "switch")}
    try:
        handler = res["handler"]
        handler.write('SIM:SEAT 1,"HAND-1"')
        assert handler.query("SYST:ERR?").startswith("0,")
        assert handler.query("HAND:IND?").split(",")[0] == "HAND-1"
        res["supply"].write("INST:NSEL 1;:VOLT 5;:OUTP ON;:INST:NSEL 2;:VOLT -5;:OUTP ON")
        res["switch"].write("ROUT:CLOS (@101)")      # site 1's power relay (docs/bench-commands.md)
        assert res["switch"].query("*OPC?") == "1"
        handler.write('SIM:SEAT 1,"HAND-2"')
        error = handler.query("SYST:ERR?")
        # -221 "Settings conflict" (SCPI-1999 vol. 2, 21.8; from memory)
        assert error.startswith("-221,")
        assert handler.query("HAND:IND?").split(",")[0] == "HAND-1"   # nothing moved
    finally:
        for resource in res.values():
            resource.close()

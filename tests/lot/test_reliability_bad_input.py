"""Bad input everywhere gets one clear line and a non-zero exit, with nothing powered and
nothing written: the simulated bench's command log shows the station never spoke to it, and
no datalog folder appears. Also: the known state on start, and operator entries at the prompt.
"""

from __future__ import annotations

import json
import shutil

import pytest
import yaml
from click.testing import CliRunner

from sim_instruments.visa_client import close_all, open_all
from station.cli.main import main
from station.config.bench_config import load_bench_config
from station.datalog.writer import DatalogWriter
from station.demo import DEMO_LIMITS, DEMO_SEQUENCE
from station.lot.bench import open_bench
from tests.support.reliability_bench import (
    assert_bench_safe,
    read_csv,
    served,
    start,
    write_sequence,
)

EXIT_REFUSED = 2


@pytest.fixture
def quiet_bench(tmp_path):
    """A served bench that records every command it is sent."""
    with served(tmp_path, parts=8, log_commands=True) as (sim, bench):
        yield sim, bench


def _run(bench, *args, sequence=DEMO_SEQUENCE, limits=DEMO_LIMITS, out=None, lot="BAD-1"):
    command = ["run", "--bench", str(bench), "--sequence", str(sequence), "--limits", str(limits)]
    if lot is not None:
        command += ["--lot", lot]
    if out is not None:
        command += ["--out", str(out)]
    return CliRunner().invoke(main, command + list(args))


def _refused(result, *words):
    assert result.exit_code == EXIT_REFUSED, result.output
    line = result.output.strip().splitlines()[-1]
    assert len(result.output.strip().splitlines()) == 1, result.output   # one line
    for word in words:
        assert word in line, line
    assert "Traceback" not in result.output


BAD_SEQUENCES = [
    ("tests:\n  - kind: contact\n    retest: [1\n", ["YAML syntax error", ":4"]),          # line of the fault
    ("sequence: s\nproduct: PX-401\nsettel: {min: 1 ms}\n", ["settel", "unknown key"]),
    ("just text\n", ["mapping"]),
]


@pytest.mark.parametrize(("text", "words"), BAD_SEQUENCES)
def test_bad_sequence_is_refused_before_the_bench_is_touched(tmp_path, quiet_bench, text, words):
    sim, bench = quiet_bench
    sequence = tmp_path / "bad.yaml"
    sequence.write_text(text)
    out = tmp_path / "lot"
    _refused(_run(bench, sequence=sequence, out=out), str(sequence), *words)
    assert sim.command_log == [] and not out.exists()


def test_bad_limit_table_and_bench_config_are_refused(tmp_path, quiet_bench):
    sim, bench = quiet_bench
    limits = tmp_path / "limits.yaml"
    limits.write_text(DEMO_LIMITS.read_text().replace("fail_hard_bin: 5", "fail_hard_bin: 77"))
    _refused(_run(bench, limits=limits, out=tmp_path / "a"), str(limits), "fail_hard_bin")
    broken = tmp_path / "broken-bench.yaml"
    broken.write_text(bench.read_text().replace("sites: 4", "sites: 9"))
    _refused(_run(broken, out=tmp_path / "b"), str(broken), "sites")
    assert sim.command_log == [] and not (tmp_path / "a").exists() and not (tmp_path / "b").exists()


def test_bad_command_line_values(tmp_path, quiet_bench):
    sim, bench = quiet_bench
    assert CliRunner().invoke(main, ["dry-run", "--parts", "-3"]).exit_code == EXIT_REFUSED
    assert CliRunner().invoke(main, ["dry-run", "--sites", "0"]).exit_code == EXIT_REFUSED
    _refused(_run(bench, lot="  ", out=tmp_path / "c"), "--lot must not be empty")
    _refused(CliRunner().invoke(main, ["dry-run", "--lot", "", "--out", str(tmp_path / "d")]), "--lot")
    _refused(_run(bench, lot=None, out=tmp_path / "e"), "--lot is required")
    _refused(_run(bench, out=None), "--out is required")
    blocker = tmp_path / "a-file"
    blocker.write_text("not a folder\n")
    _refused(_run(bench, out=blocker / "lot"), "cannot write the datalog", "a-file")
    assert sim.command_log == []
    assert not any((tmp_path / name).exists() for name in "cde")


def _datalog(folder, sequence=DEMO_SEQUENCE, complete=False):
    writer = DatalogWriter(folder)
    writer.start({"lot_id": "OLD-1", "mode": "run"},
                 {"sequence": sequence, "limits": DEMO_LIMITS, "bench": DEMO_LIMITS})
    if complete:
        writer.finish({"complete": True})
    return folder


def test_resume_refuses_what_it_cannot_continue(tmp_path, quiet_bench):
    sim, bench = quiet_bench
    (tmp_path / "empty").mkdir()
    _refused(_run(bench, "--resume", str(tmp_path / "empty"), lot=None), "not a datalog folder")
    _refused(_run(bench, "--resume", str(tmp_path / "nowhere"), lot=None), "no such folder")
    folder = _datalog(tmp_path / "old")
    other = write_sequence(tmp_path)
    _refused(_run(bench, "--resume", str(folder), sequence=other, lot=None),
             "is not the sequence file this lot started with")
    _refused(_run(bench, "--resume", str(folder), lot="OTHER-2"), "holds lot 'OLD-1'")
    _refused(CliRunner().invoke(main, ["dry-run", "--resume", str(folder)]), "resume it with `station run")
    done = _datalog(tmp_path / "done", complete=True)
    # A lot that reached its end but was never sealed (no manifest) is sealed, nothing tested;
    # once sealed, there is nothing left to resume.
    sealing = _run(bench, "--resume", str(done), lot=None)
    assert sealing.exit_code == 0 and "sealing" in sealing.output, sealing.output
    _refused(_run(bench, "--resume", str(done), lot=None), "ran to its end")
    assert sim.command_log == []


def test_an_existing_datalog_is_never_overwritten_without_force(tmp_path, quiet_bench):
    sim, bench = quiet_bench
    folder = _datalog(tmp_path / "old")
    before = {p.name: p.read_bytes() for p in folder.iterdir()}
    _refused(_run(bench, out=folder), "already holds a datalog", "--force")
    assert {p.name: p.read_bytes() for p in folder.iterdir()} == before
    assert sim.command_log == []


def test_wrong_identity_is_one_line_and_nothing_is_written(tmp_path, quiet_bench):
    sim, bench = quiet_bench
    config = yaml.safe_load(bench.read_text())
    config["instruments"]["force"]["idn"] = "NOSUCH-MAKER,XQ-0"      # not what answers at that address
    wrong = tmp_path / "wrong.yaml"
    wrong.write_text(yaml.safe_dump(config))
    result = _run(wrong, out=tmp_path / "lot")
    assert result.exit_code == 1 and "cannot open the bench" in result.output and "NOSUCH-MAKER,XQ-0" in result.output
    assert "Traceback" not in result.output and not (tmp_path / "lot").exists()
    assert_bench_safe(sim)


def test_open_puts_a_dirty_bench_in_the_known_state(tmp_path, quiet_bench):
    sim, bench = quiet_bench
    clients = open_all(sim)
    try:  # someone left the bench powered, relays closed and errors queued
        clients["supply"].write("INST:NSEL 1;:VOLT 6;:OUTP ON;:INST:NSEL 2;:VOLT -6;:OUTP ON")
        clients["force"].write("VOLT 2;:OUTP ON")
        clients["switch"].write("ROUT:CLOS (@101,102,301)")
        clients["dmm1"].write("NOT:A:COMMAND")
        assert clients["supply"].query("*OPC?") == "1" and clients["dmm1"].query("*OPC?") == "1"
    finally:
        close_all(clients)
    opened = open_bench(load_bench_config(bench))
    try:
        assert_bench_safe(sim)
        for link in opened.all_links().values():
            assert link.query("SYST:ERR:COUN?") == "0"
    finally:
        opened.close()


def test_operator_entries_through_station_run(tmp_path):
    sequence = write_sequence(tmp_path)
    with served(tmp_path, sites=1, parts=4, handler=False) as (sim, bench):
        out = tmp_path / "lot"
        # No part sits in the simulated socket, so each reads open and is re-seated once
        # (Enter). P1; P1 again (refused: tested already); P2; then Enter alone ends the lot.
        process = start(_command(bench, sequence, out), stdin=-1)
        stdout, stderr = process.communicate("P1\n\nP1\nP2\n\n\n", timeout=60)
        assert process.returncode == 0, stdout + stderr
        assert "'P1' was already tested in this lot" in stdout
        assert [row["PART_ID"] for row in read_csv(out / "parts.csv")] == ["P1", "P2"]
        # Input that ends (EOF) in the middle of a lot stops it cleanly, bench safe.
        shutil.rmtree(out)
        process = start(_command(bench, sequence, out), stdin=-1)
        stdout, stderr = process.communicate("P7\n\n", timeout=60)
        assert process.returncode == 3, stdout + stderr
        assert "operator input ended" in stdout and "Traceback" not in stderr
        assert_bench_safe(sim)
        assert json.loads((out / "lot.json").read_text())["complete"] is False


def _command(bench, sequence, out):
    import sys

    return [sys.executable, "-m", "station.cli", "run", "--bench", str(bench), "--sequence", str(sequence),
            "--limits", str(DEMO_LIMITS), "--lot", "MAN-1", "--out", str(out)]

"""Exit codes and one-line refusals of the `station` command (station/errors.py): the same bad
input gives the same code from every command; a lot id only becomes a folder name when safe;
a lot killed during its end is sealed by `--resume` or `verify --seal`."""

from __future__ import annotations

import csv
import io
import json
from pathlib import Path

import pytest
from click.testing import CliRunner

from station.cli.main import main
from station.datalog.manifest import verify_datalog
from station.demo import DEMO_LIMITS
from tests.support.stdf_helpers import make_datalog

EXIT_REFUSED = 2   # station/errors.py


def _station(*args: str) -> tuple[int, str]:
    result = CliRunner().invoke(main, list(args))
    assert "Traceback" not in result.output, result.output
    return result.exit_code, result.output


def _one_line(output: str) -> str:
    lines = output.strip().splitlines()
    assert len(lines) == 1, output
    return lines[0]


@pytest.mark.parametrize("command", [["convert", "{}", "--to", "stdf"], ["verify", "{}"], ["summary", "{}"],
                                     ["rebin", "{}", "--limits", str(DEMO_LIMITS)]])
def test_an_empty_folder_is_refused_alike_by_every_datalog_command(tmp_path: Path, command: list[str]) -> None:
    # convert used to exit 1 here, verify, summary and rebin 2.
    code, output = _station(*[part.format(tmp_path) for part in command])
    assert code == EXIT_REFUSED, output
    assert "not a datalog folder" in _one_line(output)


def test_convert_refuses_a_bad_cell_naming_file_line_and_column(tmp_path: Path) -> None:
    folder = make_datalog(tmp_path / "DL")
    lines = (folder / "results.csv").read_text().splitlines(keepends=True)
    cells = lines[3].split(",")
    cells[10] = "abc"                                   # RESULT of the third data row
    lines[3] = ",".join(cells)
    (folder / "results.csv").write_text("".join(lines))
    code, output = _station("convert", str(folder), "--to", "stdf")
    assert code == EXIT_REFUSED, output
    assert "results.csv:4: RESULT: 'abc' is not a number" in _one_line(output)
    assert not (folder / "lot.stdf").exists()


@pytest.mark.parametrize("lot", ["../../escaped", "/abs/path", "a/b", "..", ".hidden"])
def test_a_lot_id_that_is_not_a_plain_folder_name_is_refused_as_one(tmp_path: Path, lot: str,
                                                                   monkeypatch: pytest.MonkeyPatch) -> None:
    # `--lot ../../escaped` wrote the datalog two levels above datalogs/; `--lot /abs/path` there.
    work = tmp_path / "a" / "b"
    work.mkdir(parents=True)
    monkeypatch.chdir(work)
    code, output = _station("dry-run", "--parts", "1", "--sites", "1", "--speed", "100", "--lot", lot)
    assert code == EXIT_REFUSED, output
    assert "letters, digits" in _one_line(output)
    assert sorted(p.name for p in tmp_path.rglob("*")) == ["a", "b"]   # nothing written anywhere


def test_an_operator_name_with_a_line_break_is_refused(tmp_path: Path) -> None:
    code, output = _station("dry-run", "--parts", "1", "--out", str(tmp_path / "dl"), "--operator", "ann\nbob")
    assert code == EXIT_REFUSED, output
    assert "--operator" in _one_line(output)
    assert not (tmp_path / "dl").exists()


def test_verify_seal_finishes_a_lot_that_ended_without_its_manifest(tmp_path: Path) -> None:
    folder = make_datalog(tmp_path / "DL")             # lot.json complete, no manifest.json
    assert json.loads((folder / "lot.json").read_text())["complete"] is True
    assert _station("verify", str(folder))[0] == EXIT_REFUSED
    code, output = _station("verify", "--seal", str(folder))
    assert code == 0, output
    assert "sealed" in output and verify_datalog(folder).intact


def test_verify_seal_refuses_a_lot_that_has_not_ended(tmp_path: Path) -> None:
    folder = make_datalog(tmp_path / "DL")
    header = json.loads((folder / "lot.json").read_text())
    (folder / "lot.json").write_text(json.dumps({**header, "complete": False}))
    code, output = _station("verify", "--seal", str(folder))
    assert code == EXIT_REFUSED and "--resume" in _one_line(output)
    assert not (folder / "manifest.json").exists()


def test_a_dry_run_killed_after_lot_json_is_sealed_by_resume(tmp_path: Path) -> None:
    # Safety issue 2, end to end: the kill left lot.json complete and no sim_truth.csv,
    # lot.stdf or manifest.json; `--resume` refused it ("the lot ran to its end").
    out = tmp_path / "dl"
    args = ["--parts", "4", "--sites", "2", "--seed", "5", "--speed", "100"]
    code, output = _station("dry-run", *args, "--out", str(out), "--lot", "K-1", "--stdf")
    assert code == 0, output
    sealed = {name: (out / name).read_bytes() for name in ("results.csv", "parts.csv", "sim_truth.csv", "lot.stdf")}
    for name in ("manifest.json", "sim_truth.csv", "lot.stdf"):
        (out / name).unlink()
    code, output = _station("dry-run", "--resume", str(out), "--stdf")
    assert code == 0, output
    assert "sealing" in output
    report = verify_datalog(out)
    assert report.intact, report.messages()
    for name, data in sealed.items():      # nothing tested again: the same files, made again
        if name == "sim_truth.csv":
            # The resumed simulator sorted no part itself: its truth keeps the parts and their
            # true figures, without the bins and sites of the first session.
            assert _truth_without_bins(out / name) == _truth_without_bins(data), name
        else:
            assert (out / name).read_bytes() == data, name


def _truth_without_bins(source: Path | bytes) -> list[list[str]]:
    text = source.read_text(encoding="utf-8") if isinstance(source, Path) else source.decode("utf-8")
    rows = list(csv.reader(io.StringIO(text)))
    keep = [k for k, name in enumerate(rows[0]) if name not in ("BINNED_HARD_BIN", "SITE")]
    return [[row[k] for k in keep] for row in rows]

"""Datalog format 2 (results.csv PAT_LO/PAT_HI, parts.csv RESCREEN) and folders of format 1:
an old folder still loads, summarises, converts and verifies; a stopped old lot resumes and is
upgraded; the column header line must be the one of the version lot.json names."""

from __future__ import annotations

import csv
import json
from pathlib import Path

import pytest
from click.testing import CliRunner

from station.cli.main import main
from station.datalog.folder import DatalogError, read_rows
from station.datalog.manifest import verify_datalog, write_manifest
from station.review.load import load_datalogs
from station.view.follow import PartsFollower
from tests.support.review_datalogs import ROOT
from tests.support.stdf_helpers import read_stdf

# Format 1's columns as docs/datalog-format.md listed them before format 2 (written out here,
# not taken from station/datalog/folder.py).
V1_RESULTS = ["LOT_ID", "PART_ID", "HEAD_NUM", "SITE_NUM", "TEST_NUM", "TEST_TXT", "PARAM", "REGION", "VCM",
              "COND", "RESULT", "UNITS", "LO_LIMIT", "HI_LIMIT", "PASS", "GRADE"]
V1_PARTS = ["LOT_ID", "PART_ID", "HEAD_NUM", "SITE_NUM", "HARD_BIN", "SOFT_BIN", "GRADE", "PASS", "TEST_T",
            "RETEST", "FAIL_TEST", "FAULT", "END_T"]
ARGS = ["--parts", "40", "--sites", "4", "--seed", "3", "--speed", "1000"]


def _to_v1(folder: Path) -> None:
    """The folder as a station of format 1 wrote it: the format 1 columns only, lot.json
    `format` ampscreen-datalog/1, and a manifest over those files if it had one."""
    for name, columns in (("results.csv", V1_RESULTS), ("parts.csv", V1_PARTS)):
        with open(folder / name, newline="") as handle:
            rows = [dict(row) for row in csv.DictReader(handle)]
        with open(folder / name, "w", newline="") as handle:
            writer = csv.DictWriter(handle, columns, extrasaction="ignore", lineterminator="\n")
            writer.writeheader()
            writer.writerows(rows)
    lot = json.loads((folder / "lot.json").read_text())
    (folder / "lot.json").write_text(json.dumps({**lot, "format": "ampscreen-datalog/1"}, indent=2) + "\n")
    (folder / "lot.stdf").unlink(missing_ok=True)
    if (folder / "manifest.json").exists():
        write_manifest(folder)


def _dry_run(out: Path, *extra: str) -> None:
    result = CliRunner().invoke(main, ["dry-run", *ARGS, "--out", str(out), "--lot", "V-1", *extra])
    assert result.exit_code in (0, 3), result.output


def test_a_format_1_folder_loads_summarises_converts_and_verifies(tmp_path: Path) -> None:
    out = tmp_path / "old"
    _dry_run(out)
    _to_v1(out)
    assert (out / "parts.csv").read_text().splitlines()[0] == ",".join(V1_PARTS)
    assert verify_datalog(out).intact
    logs = load_datalogs([out])
    assert len(logs.parts) == 40 and logs.parts["RESCREEN"].isna().all()
    assert logs.results["PAT_LO"].isna().all() and logs.results["RESULT"].notna().all()
    rows, _ = read_rows(out / "parts.csv")
    assert all(row[-1] == "" and len(row) == len(V1_PARTS) + 1 for row in rows)
    follower = PartsFollower(out / "parts.csv")
    assert follower.poll() and len(follower.rows) == 40
    summary = CliRunner().invoke(main, ["summary", str(out)])
    assert summary.exit_code == 0, summary.output
    verify = CliRunner().invoke(main, ["verify", str(out)])
    assert verify.exit_code == 0, verify.output
    stdf = tmp_path / "old.stdf"
    convert = CliRunner().invoke(main, ["convert", str(out), "--to", "stdf", "--out", str(stdf)])
    assert convert.exit_code == 0, convert.output
    # pystdf (the independent reader) finds a PRR per part and a PTR per result row.
    records = read_stdf(stdf)
    assert sum(r.name == "Prr" for r in records) == 40
    assert sum(r.name == "Ptr" for r in records) == len(logs.results)


def test_the_header_line_must_be_the_version_lot_json_names(tmp_path: Path) -> None:
    out = tmp_path / "lot"
    _dry_run(out)
    lot = json.loads((out / "lot.json").read_text())
    (out / "lot.json").write_text(json.dumps({**lot, "format": "ampscreen-datalog/1"}))
    with pytest.raises(DatalogError, match=r"parts\.csv:1: .*format 1"):
        load_datalogs([out])
    (out / "lot.json").write_text(json.dumps({**lot, "format": "ampscreen-datalog/3"}))
    with pytest.raises(DatalogError, match="format 'ampscreen-datalog/3'"):
        load_datalogs([out])


def test_a_stopped_format_1_lot_resumes_in_format_2_and_verifies(tmp_path: Path) -> None:
    seq = tmp_path / "seq.yaml"
    (tmp_path / "px401_apps.yaml").write_text((ROOT / "sequences" / "px401_apps.yaml").read_text())
    seq.write_text((ROOT / "sequences" / "px401_screen.yaml").read_text()
                   + "lot_control:\n  - {rule: consecutive_fails, count: 3, action: stop}\n")
    out = tmp_path / "lot"
    _dry_run(out, "--sequence", str(seq), "--fixture-fault", "contact:2@20")
    lot = json.loads((out / "lot.json").read_text())
    assert lot["complete"] is False
    _to_v1(out)
    resumed = CliRunner().invoke(main, ["dry-run", "--resume", str(out), "--sequence", str(seq),
                                        "--speed", "1000"])
    assert resumed.exit_code == 0, resumed.output
    assert "rewritten in ampscreen-datalog/2" in resumed.output
    lot = json.loads((out / "lot.json").read_text())
    assert lot["format"] == "ampscreen-datalog/2" and lot["complete"] is True
    assert lot["format_upgraded"]["from"] == "ampscreen-datalog/1"
    assert (out / "parts.csv").read_text().splitlines()[0].endswith(",END_T,RESCREEN")
    assert len(load_datalogs([out]).parts) == 40
    verify = CliRunner().invoke(main, ["verify", str(out)])
    assert verify.exit_code == 0, verify.output

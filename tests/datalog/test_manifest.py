"""manifest.json and `station verify`: every changed, missing or added file is caught.

Outside check: file hashes are recomputed here with hashlib (SHA-256, FIPS 180-4).
"""

from __future__ import annotations

import hashlib
import json
from pathlib import Path

import pytest
from click.testing import CliRunner

from station.cli.datalog_commands import verify_command
from station.datalog.manifest import verify_datalog, write_manifest
from station.datalog.stdf_export import write_stdf
from tests.support.stdf_helpers import make_datalog


def _sealed(folder: Path) -> Path:
    """A finished datalog: CSVs, lot.json, YAML copies, lot.stdf, then the manifest."""
    make_datalog(folder)
    write_stdf(folder)
    write_manifest(folder)
    return folder


def _verify(folder: Path) -> tuple[int, str]:
    result = CliRunner().invoke(verify_command, [str(folder)])
    assert "Traceback" not in result.output
    return result.exit_code, result.output


def _flip_one_byte(path: Path) -> None:
    data = bytearray(path.read_bytes())
    data[len(data) // 2] ^= 0x01
    path.write_bytes(bytes(data))


def test_manifest_lists_every_other_file_with_hash_and_size(tmp_path: Path) -> None:
    folder = _sealed(tmp_path / "DL")
    manifest = json.loads((folder / "manifest.json").read_text())
    files = sorted(p.name for p in folder.iterdir() if p.name != "manifest.json")
    assert sorted(manifest["files"]) == files
    assert "lot.stdf" in files and "results.csv" in files
    for name in files:
        data = (folder / name).read_bytes()
        assert manifest["files"][name] == {"sha256": hashlib.sha256(data).hexdigest(),
                                           "size": len(data)}
    assert manifest["written"].endswith("Z")


def test_intact_folder_passes(tmp_path: Path) -> None:
    folder = _sealed(tmp_path / "DL")
    report = verify_datalog(folder)
    assert report.intact and report.checked == 7
    code, output = _verify(folder)
    assert code == 0 and "intact" in output


@pytest.mark.parametrize("name", ["results.csv", "parts.csv", "lot.json", "sequence.yaml",
                                  "limits.yaml", "bench.yaml", "lot.stdf", "manifest.json"])
def test_one_changed_byte_in_any_file_is_caught(tmp_path: Path, name: str) -> None:
    folder = _sealed(tmp_path / "DL")
    _flip_one_byte(folder / name)
    code, output = _verify(folder)
    assert code == 2   # refused: the folder is not what the lot left
    assert name in output


def test_manifest_cannot_be_changed_even_where_json_stays_valid(tmp_path: Path) -> None:
    folder = _sealed(tmp_path / "DL")
    path = folder / "manifest.json"
    text = path.read_text()
    # Edits that keep valid JSON: a different written time, a reformatted layout.
    for edited in (text.replace('"written": "', '"written": "1', 1), text.replace("\n  ", "\n ", 1)):
        path.write_text(edited)
        assert _verify(folder)[0] == 2
    path.write_text(text)
    assert _verify(folder)[0] == 0


def test_missing_and_added_files_are_named(tmp_path: Path) -> None:
    folder = _sealed(tmp_path / "DL")
    (folder / "parts.csv").unlink()
    (folder / "notes.txt").write_text("added later\n")
    code, output = _verify(folder)
    assert code == 2   # refused: the folder is not what the lot left
    assert "missing: parts.csv" in output and "added: notes.txt" in output
    report = verify_datalog(folder)
    assert (report.missing, report.added, report.changed) == (["parts.csv"], ["notes.txt"], [])


def test_config_copy_must_match_the_hash_lot_json_recorded(tmp_path: Path) -> None:
    folder = _sealed(tmp_path / "DL")
    (folder / "limits.yaml").write_text("grades: [A, B, C]\n")
    write_manifest(folder)  # even a re-written manifest does not hide the swapped limits
    code, output = _verify(folder)
    assert code == 2   # refused: the folder is not what the lot left
    assert "limits.yaml" in output and "lot.json" in output


def test_folder_without_manifest_is_not_intact(tmp_path: Path) -> None:
    folder = make_datalog(tmp_path / "DL")
    code, output = _verify(folder)
    assert code == 2 and "manifest.json: missing" in output


def test_not_a_datalog_exits_2(tmp_path: Path) -> None:
    (tmp_path / "empty").mkdir()
    for target in (tmp_path / "empty", tmp_path / "nowhere"):
        code, output = _verify(target)
        assert code == 2
        assert "not a datalog" in output and len(output.strip().splitlines()) == 1

"""`station convert DATALOG --to stdf`: output read back with pystdf (the independent reader)."""

from __future__ import annotations

from pathlib import Path

from click.testing import CliRunner

from station.cli.datalog_commands import convert_command, verify_command
from station.datalog.manifest import write_manifest
from tests.support.stdf_helpers import SCENARIO, make_datalog, of_type, read_stdf


def _run(command: object, args: list[str]) -> tuple[int, str]:
    result = CliRunner().invoke(command, args)  # type: ignore[arg-type]
    assert "Traceback" not in result.output
    return result.exit_code, result.output


def test_convert_writes_lot_stdf_by_default_and_to_out(tmp_path: Path) -> None:
    folder = make_datalog(tmp_path / "DL")
    code, output = _run(convert_command, [str(folder), "--to", "stdf"])
    assert code == 0 and "lot.stdf" in output
    records = read_stdf(folder / "lot.stdf")
    assert len(of_type(records, "Prr")) == len(SCENARIO)
    out = tmp_path / "copy.stdf"
    assert _run(convert_command, [str(folder), "--to", "stdf", "--out", str(out)])[0] == 0
    assert out.read_bytes() == (folder / "lot.stdf").read_bytes()


def test_convert_into_a_sealed_folder_records_the_file(tmp_path: Path) -> None:
    folder = make_datalog(tmp_path / "DL")
    write_manifest(folder)
    assert _run(convert_command, [str(folder), "--to", "stdf"])[0] == 0
    code, output = _run(verify_command, [str(folder)])
    assert code == 0, output


def test_convert_does_not_reseal_a_damaged_folder(tmp_path: Path) -> None:
    folder = make_datalog(tmp_path / "DL")
    write_manifest(folder)
    with (folder / "parts.csv").open("a") as handle:
        handle.write("\n")
    assert _run(convert_command, [str(folder), "--to", "stdf"])[0] == 0
    code, output = _run(verify_command, [str(folder)])
    assert code == 2 and "changed: parts.csv" in output and "added: lot.stdf" in output


def test_convert_errors_are_one_line(tmp_path: Path) -> None:
    code, output = _run(convert_command, [str(tmp_path), "--to", "stdf"])
    assert code == 2 and output.startswith("Error:") and len(output.strip().splitlines()) == 1
    code, output = _run(convert_command, [str(tmp_path)])  # --to is required
    assert code == 2 and "--to" in output

"""Review tools on damaged datalogs: one line naming the file, the row and what is wrong, exit 2.

Each case is a way a datalog gets damaged in practice (a copy cut short, a hand edit, a file
written by something else); before these checks some of them gave tracebacks or, worse, a
summary or a re-bin computed from part of the data.
"""

from __future__ import annotations

import json
import shutil
from collections.abc import Callable
from pathlib import Path

import pytest
from click.testing import CliRunner

from station.cli.main import main as cli
from tests.support.review_datalogs import PX401_LIMITS, LotSpec, make_datalog

COMMANDS = {
    "summary": lambda folder, tmp: ["summary", str(folder)],
    "summary --by site": lambda folder, tmp: ["summary", str(folder), "--by", "site"],
    "rebin": lambda folder, tmp: ["rebin", str(folder), "--limits", str(PX401_LIMITS)],
    "convert": lambda folder, tmp: ["convert", str(folder), "--to", "stdf", "--out", str(tmp / "x.stdf")],
}


@pytest.fixture(scope="module")
def pristine(tmp_path_factory) -> Path:
    return make_datalog(tmp_path_factory.mktemp("lot") / "lot", LotSpec(parts=12, sites=2))


def _torn_results(folder: Path) -> str:
    text = (folder / "results.csv").read_bytes()
    (folder / "results.csv").write_bytes(text[: len(text) * 2 // 3])   # cut inside a row
    return "results.csv:"


def _garbage_row(folder: Path) -> str:
    lines = (folder / "results.csv").read_text().splitlines(keepends=True)
    lines[4] = "garbage,row\n"
    (folder / "results.csv").write_text("".join(lines))
    return "results.csv:5:"


def _text_in_result(folder: Path) -> str:
    lines = (folder / "results.csv").read_text().splitlines(keepends=True)
    cells = lines[3].rstrip("\n").split(",")
    cells[10] = "abc"                                # RESULT
    lines[3] = ",".join(cells) + "\n"
    (folder / "results.csv").write_text("".join(lines))
    return "results.csv:4:"


def _bins_not_a_table(folder: Path) -> str:
    lot = json.loads((folder / "lot.json").read_text())
    lot["hard_bins"] = 5
    (folder / "lot.json").write_text(json.dumps(lot))
    return "lot.json: hard_bins:"


def _short_part_row(folder: Path) -> str:
    lines = (folder / "parts.csv").read_text().splitlines(keepends=True)
    lines[2] = ",".join(lines[2].split(",")[:5]) + "\n"
    (folder / "parts.csv").write_text("".join(lines))
    return "parts.csv:3:"


DAMAGE: dict[str, Callable[[Path], str]] = {
    "torn results.csv": _torn_results, "garbage row": _garbage_row, "text as a result": _text_in_result,
    "hard_bins: 5": _bins_not_a_table, "short parts row": _short_part_row,
}


@pytest.mark.parametrize("damage", DAMAGE)
@pytest.mark.parametrize("command", COMMANDS)
def test_damaged_datalog_is_refused_in_one_line(pristine: Path, tmp_path: Path, damage: str, command: str) -> None:
    folder = tmp_path / "lot"
    shutil.copytree(pristine, folder)
    where = DAMAGE[damage](folder)
    result = CliRunner().invoke(cli, COMMANDS[command](folder, tmp_path), env={"COLUMNS": "200"})
    assert result.exit_code == 2, result.output
    lines = [line for line in result.output.splitlines() if line.strip()]
    assert len(lines) == 1, result.output          # one line, nothing printed before it
    assert where in lines[0], lines[0]
    assert result.exception is None or isinstance(result.exception, SystemExit)


def test_summary_into_a_missing_folder_refuses_before_printing(pristine: Path, tmp_path: Path) -> None:
    target = tmp_path / "no_such_folder" / "report.html"
    result = CliRunner().invoke(cli, ["summary", str(pristine), "--html", str(target)])
    assert result.exit_code == 2
    assert result.output.count("\n") == 1 and "does not exist" in result.output
    assert not target.parent.exists()


def test_rebin_with_another_products_table_is_refused(pristine: Path, tmp_path: Path) -> None:
    other = tmp_path / "other.yaml"
    text = PX401_LIMITS.read_text()
    assert "product: PX-401\n" in text
    other.write_text(text.replace("product: PX-401\n", "product: QX-7\n"))
    result = CliRunner().invoke(cli, ["rebin", str(pristine), "--limits", str(other)])
    assert result.exit_code == 2
    assert "is a datalog of PX-401, the limit table is for QX-7" in result.output


def test_the_pristine_copy_still_summarises(pristine: Path) -> None:
    # The damage above is what is refused: the same folder undamaged is read.
    assert CliRunner().invoke(cli, ["summary", str(pristine)]).exit_code == 0


def test_rebin_any_product_takes_a_table_derived_from_the_data(pristine: Path, tmp_path: Path) -> None:
    derived = tmp_path / "derived.yaml"
    derived.write_text(PX401_LIMITS.read_text().replace("product: PX-401\n", "product: PX-401-NEW\n"))
    refused = CliRunner().invoke(cli, ["rebin", str(pristine), "--limits", str(derived)])
    taken = CliRunner().invoke(cli, ["rebin", str(pristine), "--limits", str(derived), "--any-product"])
    assert refused.exit_code == 2 and taken.exit_code == 0, taken.output
    assert "parts change bin" in taken.output

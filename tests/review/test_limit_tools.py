"""Limit tools: check, show, diff on hand-made tables, and propose whose predicted yield holds."""

from __future__ import annotations

from pathlib import Path

import click
import numpy as np
import pytest
from click.testing import CliRunner

from station.cli.review_commands import limits_group, rebin_command, summary_command  # noqa: E402
from station.config.limit_tables import load_limit_table, parse_limit_table  # noqa: E402
from station.review.limit_tools import diff_tables  # noqa: E402
from station.review.load import load_datalogs  # noqa: E402
from station.review.propose import propose  # noqa: E402
from station.review.rebin import grade_yield, rebin  # noqa: E402
from tests.support.review_datalogs import PX401_LIMITS, LotSpec, make_datalog  # noqa: E402


@click.group()
def cli() -> None:
    """Stands in for the main `station` group."""


cli.add_command(limits_group)
cli.add_command(summary_command)
cli.add_command(rebin_command)

BASE = PX401_LIMITS.read_text()


def _edit(*pairs: tuple[str, str]) -> str:
    text = BASE
    for old, new in pairs:
        assert old in text, old
        text = text.replace(old, new, 1)
    return text


def test_check_ok_and_error_lines(tmp_path: Path) -> None:
    runner = CliRunner()
    ok = runner.invoke(cli, ["limits", "check", str(PX401_LIMITS)])
    assert ok.exit_code == 0
    assert ok.output.startswith("OK: ") and "grades A, B" in ok.output and "3 regions" in ok.output
    bad = tmp_path / "bad.yaml"
    bad.write_text(_edit(("{param: vos,       low: -50 uV", "{param: vos,       low: -50 uA")))
    result = runner.invoke(cli, ["limits", "check", str(bad)])
    assert result.exit_code == 2  # refused input
    lines = result.output.strip().splitlines()
    assert len(lines) == 1 and lines[0].startswith(f"Error: {bad}:")
    assert "Traceback" not in result.output


def test_show_uses_readable_units_per_grade() -> None:
    result = CliRunner().invoke(cli, ["limits", "show", str(PX401_LIMITS), "--grade", "A"], env={"COLUMNS": "160"})
    assert result.exit_code == 0, result.output
    assert "Grade A" in result.output and "Grade B:" not in result.output
    assert "-50 uV" in result.output and "300 uA" in result.output and "120 dB" in result.output
    assert "V+ - 1.6 V" in result.output
    missing = CliRunner().invoke(cli, ["limits", "show", str(PX401_LIMITS), "--grade", "Z"])
    assert missing.exit_code == 2 and "no grade 'Z'" in missing.output


def test_diff_names_each_kind_of_change() -> None:
    old = parse_limit_table(BASE, "old.yaml")
    new = parse_limit_table(_edit(
        ("{param: vos,       low: -50 uV, high: 50 uV,  soft_bin: 11",
         "{param: vos,       low: -40 uV, high: 40 uV,  soft_bin: 11"),                  # A vos tightened
        ("{param: cmrr,      region: low,  low: 110 dB", "{param: cmrr,      region: low,  low: 105 dB"),  # B loosened
        ("{param: aol,       low: 120 dB, soft_bin: 17, bin: Open-loop gain}",
         "{param: aol,       low: 120 dB, soft_bin: 19, bin: Gain}"),                     # A bin changed
        ("      - {param: psrr,      low: 120 dB, soft_bin: 18, bin: PSRR}\n", ""),      # A psrr removed
        ('to: "V+ - 1.6 V", kind: slope', 'to: "V+ - 1.8 V", kind: slope'),
        ('transition: {from: "V+ - 1.6 V"', 'transition: {from: "V+ - 1.8 V"'),
    ), "new.yaml")
    changes = {(c.kind, c.grade, c.param, c.region) for c in diff_tables(old, new)}
    assert ("tightened", "A", "vos", "") in changes
    assert ("loosened", "B", "cmrr", "low") in changes
    assert ("bin", "A", "aol", "") in changes
    assert ("removed", "A", "psrr", "") in changes
    assert ("region", "", "", "low") in changes and ("region", "", "", "transition") in changes
    assert ("added", "A", "psrr", "") not in changes
    back = {(c.kind, c.grade, c.param) for c in diff_tables(new, old)}
    assert ("added", "A", "psrr") in back and ("loosened", "A", "vos") in back
    assert diff_tables(old, parse_limit_table(BASE, "same.yaml")) == []


def test_diff_command_prints_the_changes(tmp_path: Path) -> None:
    new = tmp_path / "new.yaml"
    new.write_text(_edit(("{param: iq,        low: 300 uA, high: 600 uA, soft_bin: 10",
                          "{param: iq,        low: 280 uA, high: 580 uA, soft_bin: 10")))
    result = CliRunner().invoke(cli, ["limits", "diff", str(PX401_LIMITS), str(new)], env={"COLUMNS": "200"})
    assert result.exit_code == 0, result.output
    assert "mixed" in result.output and "280 uA" in result.output


@pytest.fixture(scope="module")
def characterisation(tmp_path_factory) -> Path:
    return make_datalog(tmp_path_factory.mktemp("char") / "lot", LotSpec(parts=300, sites=2, seed=41))


def test_propose_gives_limits_whose_predicted_yield_a_rebin_confirms(characterisation: Path, tmp_path: Path) -> None:
    logs = load_datalogs([characterisation])
    text, table, proposals, per_limit, overall = propose(logs, "PX-401P", 3.0)
    written = tmp_path / "proposed.yaml"
    written.write_text(text)
    assert CliRunner().invoke(cli, ["limits", "check", str(written)]).exit_code == 0
    reloaded = load_limit_table(written)
    assert [g.name for g in reloaded.grades] == ["P"]
    result = rebin(logs, reloaded)
    assert grade_yield(result.after, ["P"])["P"] == pytest.approx(overall)
    assert 0.5 < overall < 1.0
    # The CMRR minimum comes from the slope spread: -20 log10(|mean| + 3 sigma) (common practice,
    # no source), computed here with numpy from the logged slopes.
    slopes = logs.results.loc[(logs.results["PARAM"] == "cmrr_slope") & (logs.results["REGION"] == "low"),
                              "RESULT"].to_numpy()
    expected = -20 * np.log10(abs(slopes.mean()) + 3 * slopes.std(ddof=1))
    low = next(lim for lim in reloaded.grades[0].limits if lim.param == "cmrr" and lim.region == "low")
    assert low.low == pytest.approx(expected, abs=0.05)  # written with 4 significant digits
    vos = next(p for p in proposals if p.param == "vos")
    values = logs.results.loc[logs.results["PARAM"] == "vos", "RESULT"].to_numpy()
    # typical = mean + 1 sigma (common practice, no source; docs/methods.md "End-of-shift
    # statistics"), of |Vos| here; numpy computes the reference.
    assert vos.typical == pytest.approx(abs(values.mean()) + values.std(ddof=1))
    assert vos.high == pytest.approx(abs(values.mean()) + 3 * values.std(ddof=1), rel=1e-3)


def test_propose_command_writes_a_table(characterisation: Path, tmp_path: Path) -> None:
    out = tmp_path / "p.yaml"
    result = CliRunner().invoke(cli, ["limits", "propose", str(characterisation), "--product", "PX-401P",
                                      "--sigma", "4", "--out", str(out)], env={"COLUMNS": "200"})
    assert result.exit_code == 0, result.output
    assert "Predicted yield with every limit" in result.output
    assert load_limit_table(out).product == "PX-401P"


def test_summary_and_rebin_commands(characterisation: Path, tmp_path: Path) -> None:
    runner = CliRunner()
    csv_file, html_file = tmp_path / "s.csv", tmp_path / "s.html"
    result = runner.invoke(cli, ["summary", str(characterisation), "--by", "hour", "--csv", str(csv_file),
                                 "--html", str(html_file)], env={"COLUMNS": "200"})
    assert result.exit_code == 0, result.output
    assert "Failure Pareto" in result.output and "Yield by hour" in result.output
    assert csv_file.is_file() and html_file.is_file()
    nothing = runner.invoke(cli, ["summary", str(tmp_path)])
    assert nothing.exit_code == 2 and "not a datalog folder" in nothing.output
    assert "Traceback" not in nothing.output
    rebinned = runner.invoke(cli, ["rebin", str(characterisation), "--limits", str(PX401_LIMITS),
                                   "--out", str(tmp_path / "rb")], env={"COLUMNS": "200"})
    assert rebinned.exit_code == 0, rebinned.output
    assert "0 of" in rebinned.output and "parts change bin" in rebinned.output
    assert (tmp_path / "rb" / "parts.csv").read_text() == (characterisation / "parts.csv").read_text()

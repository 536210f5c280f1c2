"""`station limits set`: one limit changed in place, every other byte kept, a change record."""

from __future__ import annotations

import shutil

from click.testing import CliRunner

from station.cli.main import DEMO_LIMITS, main
from station.config.limit_tables import load_limit_table


def _copy(tmp_path):
    path = tmp_path / "px401.yaml"
    shutil.copy(DEMO_LIMITS, path)
    return path


def test_set_changes_one_value_and_keeps_every_comment_byte_for_byte(tmp_path):
    path = _copy(tmp_path)
    before = path.read_text()
    result = CliRunner().invoke(main, ["limits", "set", str(path), "--grade", "A", "--param", "cmrr",
                                       "--region", "low", "--low", "121 dB", "--reason", "tighter for customer X",
                                       "--who", "tester"])
    assert result.exit_code == 0, result.output
    after = path.read_text()
    old_lines, new_lines = before.splitlines(), after.splitlines()
    changed = [i for i, (a, b) in enumerate(zip(old_lines, new_lines, strict=False)) if a != b]
    assert len(changed) == 1
    assert new_lines[changed[0]] == old_lines[changed[0]].replace("low: 120 dB", "low: 121 dB")
    # Every line of the original is still there in order (comments, alignment), then the record.
    assert new_lines[:len(old_lines)] == [old_lines[i] if i not in changed else new_lines[i]
                                          for i in range(len(old_lines))]
    comments = [line for line in old_lines if "#" in line]
    assert all(c in after for c in comments)
    table = load_limit_table(path)
    assert next(lim for lim in table.grades[0].limits if (lim.param, lim.region) == ("cmrr", "low")).low == 121.0
    record = table.changes[-1]
    assert (record["what"], record["old"], record["new"], record["who"], record["why"]) == (
        "grade A cmrr low low", "120 dB", "121 dB", "tester", "tighter for customer X")
    shown = CliRunner().invoke(main, ["limits", "show", str(path), "--history"])
    assert "tighter for customer X" in shown.output and "tester" in shown.output


def test_a_bad_value_is_refused_with_file_and_line_and_nothing_written(tmp_path):
    path = _copy(tmp_path)
    before = path.read_bytes()
    result = CliRunner().invoke(main, ["limits", "set", str(path), "--grade", "A", "--param", "cmrr",
                                       "--region", "low", "--low", "118 uV", "--reason", "slip"])
    assert result.exit_code == 2
    line = next(i for i, text in enumerate(before.decode().splitlines(), 1) if "region: low,  low: 120 dB" in text)
    assert f"{path}:{line}:" in result.output and "dB" in result.output
    assert path.read_bytes() == before


def test_a_grade_looser_than_the_next_is_refused(tmp_path):
    path = _copy(tmp_path)
    before = path.read_bytes()
    # Grade B's CMRR low limit is 110 dB: grade A at 108 dB would be looser than B.
    result = CliRunner().invoke(main, ["limits", "set", str(path), "--grade", "A", "--param", "cmrr",
                                       "--region", "low", "--low", "108 dB", "--reason", "x"])
    assert result.exit_code == 2 and "looser than grade B" in result.output
    assert path.read_bytes() == before


def test_unknown_grade_or_limit_is_named(tmp_path):
    path = _copy(tmp_path)
    result = CliRunner().invoke(main, ["limits", "set", str(path), "--grade", "Z", "--param", "vos",
                                       "--high", "40 uV", "--reason", "x"])
    assert result.exit_code == 2 and "no grade 'Z'" in result.output

"""Static PAT limits (`station limits pat`): computed from passing parts, clipped to the spec,
written as a layer that reads back, refused on too little data."""

from __future__ import annotations

from pathlib import Path

import numpy as np
import pytest
from click.testing import CliRunner

from station.cli.main import main
from station.config.limit_tables import load_limit_table, parse_limit_table
from station.review.load import load_datalogs
from station.screen.pat_limits import PatError, figure_values, static_pat
from tests.screen.pat_support import pat_table_text
from tests.support.review_datalogs import LotSpec, make_datalog


@pytest.fixture(scope="module")
def lots(tmp_path_factory: pytest.TempPathFactory) -> list[Path]:
    base = tmp_path_factory.mktemp("patlots")
    return [make_datalog(base / f"L{i}", LotSpec(parts=240, seed=20 + i, lot_id=f"LOT-P{i}")) for i in range(2)]


@pytest.fixture()
def table_file(tmp_path: Path) -> Path:
    path = tmp_path / "pat_base.yaml"
    path.write_text(pat_table_text())
    return path


def test_limits_are_median_plus_minus_k_iqr_over_1_35_of_passing_parts(lots: list[Path], table_file: Path) -> None:
    logs = load_datalogs(lots)
    table = load_limit_table(table_file)
    figures = {f.label: f for f in static_pat(logs, table, 6.0)}
    passing = set(logs.parts.loc[logs.parts["PASS"] == 1, "PART_SEQ"])
    rows = logs.results[(logs.results["PARAM"] == "vos") & logs.results["PART_SEQ"].isin(passing)]
    vos = rows["RESULT"].to_numpy()
    q1, q3 = np.percentile(vos, [25, 75])     # numpy percentile, linear (numpy documentation)
    median = np.median(vos)
    f = figures["vos"]
    assert f.count == len(vos)
    assert f.median == pytest.approx(median)
    assert f.low == pytest.approx(max(median - 6 * (q3 - q1) / 1.35, -150e-6))
    assert f.high == pytest.approx(min(median + 6 * (q3 - q1) / 1.35, 150e-6))
    # never looser than the loosest grade's limit; rejection figures: low side only
    for fig in figures.values():
        if fig.spec_low is not None and fig.low is not None:
            assert fig.low >= fig.spec_low
        if fig.spec_high is not None:
            assert fig.high is not None and fig.high <= fig.spec_high
    assert figures["cmrr low"].high is None and figures["psrr"].high is None


def test_flag_counts_are_the_input_parts_outside(lots: list[Path], table_file: Path) -> None:
    logs = load_datalogs(lots)
    figures = static_pat(logs, load_limit_table(table_file), 1.0)   # tight: many flagged
    values = figure_values(logs)
    for f in figures:
        sub = values[(values["PARAM"] == f.param) & (values["REGION"] == (f.region or ""))]["RESULT"].to_numpy()
        bad = ~np.isfinite(sub)
        if f.low is not None:
            bad |= sub < f.low
        if f.high is not None:
            bad |= sub > f.high
        expected = int(bad.sum())
        assert f.flagged == expected
    assert any(f.flagged > 0 for f in figures)


def test_command_writes_a_pat_layer_that_reads_back(lots: list[Path], table_file: Path, tmp_path: Path) -> None:
    out = tmp_path / "new.yaml"
    result = CliRunner().invoke(main, ["limits", "pat", str(table_file), "--from", str(lots[0]),
                                       "--from", str(lots[1]), "--sigma", "6", "--out", str(out)])
    assert result.exit_code == 0, result.output
    assert "flagged" in result.output
    new = load_limit_table(out)
    assert new.pat is not None and new.pat.hard_bin == 7
    params = {(lim.param, lim.region) for lim in new.pat.limits}
    assert ("vos", None) in params and ("cmrr", "low") in params
    assert all(lim.soft_bin in new.soft_bins for lim in new.pat.limits)
    # the grades are untouched; running it again on its own output replaces the layer
    assert new.grades == load_limit_table(table_file).grades
    again = tmp_path / "again.yaml"
    result = CliRunner().invoke(main, ["limits", "pat", str(out), "--from", str(lots[0]), "--out", str(again)])
    assert result.exit_code == 0, result.output
    assert again.read_text().count("\npat:") == 1


def test_too_little_data_is_refused_saying_how_much_and_why(tmp_path: Path, table_file: Path) -> None:
    small = make_datalog(tmp_path / "small", LotSpec(parts=20, seed=4, tester_faults=0, opens=0, shorts=0,
                                                      retests=0))
    with pytest.raises(PatError, match=r"at least 30 per figure.*1.17/sqrt\(n\)"):
        static_pat(load_datalogs([small]), load_limit_table(table_file), 6.0)
    result = CliRunner().invoke(main, ["limits", "pat", str(table_file), "--from", str(small),
                                       "--out", str(tmp_path / "x.yaml")])
    assert result.exit_code == 2 and "too few passing parts" in result.output
    assert not (tmp_path / "x.yaml").exists()


def test_a_table_without_a_pat_section_is_refused(lots: list[Path], tmp_path: Path) -> None:
    from tests.support.review_datalogs import PX401_LIMITS

    with pytest.raises(PatError, match="no pat: section"):
        static_pat(load_datalogs([lots[0]]), load_limit_table(PX401_LIMITS), 6.0)


def test_pat_section_is_checked() -> None:
    from station.config.files import ConfigError

    with pytest.raises(ConfigError, match="hard bin 8 is not defined"):
        parse_limit_table(pat_table_text().replace("hard_bin: 7\n", "hard_bin: 8\n"))
    bad = pat_table_text("  limits:\n    - {param: vos, high: 90 uV, soft_bin: 11, bin: PAT Offset}\n")
    with pytest.raises(ConfigError, match="soft bin 11 is already"):
        parse_limit_table(bad)
    with pytest.raises(ConfigError, match="baseline"):
        parse_limit_table(pat_table_text("  dynamic: {baseline: 10, soft_bin: 49}\n"))

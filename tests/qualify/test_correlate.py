"""`station correlate`: reference units tested on a (simulated) bench through the real drivers."""

from __future__ import annotations

import json

import pytest
from click.testing import CliRunner

from sim_instruments.bench import SimBench, SimSettings
from station.cli.main import main
from station.demo import demo_file

UNITS = demo_file("benches", "px401-correlation-units.yaml")


@pytest.fixture
def bench(tmp_path):
    with SimBench(SimSettings(seed=1, parts=3, sites=4, speed=20)) as sim:
        path = tmp_path / "bench.yaml"
        sim.write_bench_config(path)
        yield path


def test_units_in_correlation_pass_and_the_result_is_in_lot_json(bench, tmp_path):
    out = tmp_path / "corr"
    result = CliRunner().invoke(main, ["correlate", "--bench", str(bench), "--units", str(UNITS), "--out", str(out)])
    assert result.exit_code == 0, result.output
    assert "station in correlation on 10 figure(s) of 3 unit(s)" in result.output
    record = json.loads((out / "lot.json").read_text())["correlation"]
    assert record["in_correlation"] is True and len(record["figures"]) == 10
    # The manifest was written again over the lot.json with the result.
    assert CliRunner().invoke(main, ["verify", str(out)]).exit_code == 0


def test_a_figure_out_of_correlation_refuses_naming_figure_unit_values_and_tolerance(bench, tmp_path):
    units = tmp_path / "units.yaml"
    units.write_text(UNITS.read_text().replace("reference: 2.73 uV", "reference: 8.73 uV"))
    out = tmp_path / "corr"
    result = CliRunner().invoke(main, ["correlate", "--bench", str(bench), "--units", str(units), "--out", str(out)])
    assert result.exit_code == 2
    line = next(line for line in result.output.splitlines() if line.startswith("Error:"))
    assert "vos on unit D00002: measured 2.7" in line
    assert "reference 8.73 uV, tolerance +-1 uV: OUT OF CORRELATION" in line
    assert json.loads((out / "lot.json").read_text())["correlation"]["in_correlation"] is False


def test_a_bad_units_file_is_refused_with_file_and_line(tmp_path, bench):
    units = tmp_path / "units.yaml"
    units.write_text(UNITS.read_text().replace("tolerance: 2 uA}", "tolerance: 2 uV}", 1))
    result = CliRunner().invoke(main, ["correlate", "--bench", str(bench), "--units", str(units),
                                       "--out", str(tmp_path / "c")])
    assert result.exit_code == 2 and f"{units}:11:" in result.output
    assert not (tmp_path / "c").exists()       # nothing was run


def test_a_lot_starts_only_on_a_passed_correlation_of_its_station(bench, tmp_path):
    corr = tmp_path / "corr"
    assert CliRunner().invoke(main, ["correlate", "--bench", str(bench), "--units", str(UNITS),
                                     "--out", str(corr)]).exit_code == 0
    with SimBench(SimSettings(seed=2, parts=4, sites=4, speed=20)) as sim:
        lot_bench = tmp_path / "lot-bench.yaml"
        sim.write_bench_config(lot_bench)
        args = ["run", "--bench", str(lot_bench), "--sequence", str(demo_file("sequences", "px401_screen.yaml")),
                "--limits", str(demo_file("limits", "px401.yaml")), "--lot", "L-1"]
        result = CliRunner().invoke(main, [*args, "--out", str(tmp_path / "lot"), "--correlation", str(corr)])
        assert result.exit_code == 0, result.output
    record = json.loads((tmp_path / "lot" / "lot.json").read_text())["correlation"]
    assert record["in_correlation"] is True and record["folder"] == str(corr)
    # Out of correlation: the lot is refused before anything is powered or written.
    header = json.loads((corr / "lot.json").read_text())
    header["correlation"]["in_correlation"] = False
    header["correlation"]["figures"][0]["ok"] = False
    (corr / "lot.json").write_text(json.dumps(header))
    result = CliRunner().invoke(main, [*args, "--out", str(tmp_path / "lot2"), "--correlation", str(corr)])
    assert result.exit_code == 2 and "out of correlation (vos on unit D00001)" in result.output
    assert not (tmp_path / "lot2").exists()

"""`station study run` on the simulated bench with its own errors, and `station study report`:
the study finds the bench's repeatability, site offsets and leakage within the bounds its
sample size gives."""

from __future__ import annotations

import json
import math

import numpy as np
import pytest
from click.testing import CliRunner
from scipy import stats

from sim_instruments.model import expected_noise_rti, vos_true
from sim_instruments.population import make_population
from station.cli.main import main
from station.qualify.study import load_study, study_report

PARTS, REPEATS, SITES, SEED, BENCH_SEED = 4, 3, 4, 3, 11


@pytest.fixture(scope="module")
def study(tmp_path_factory):
    out = tmp_path_factory.mktemp("study") / "s1"
    result = CliRunner().invoke(main, ["study", "run", "--parts", str(PARTS), "--repeats", str(REPEATS),
                                       "--sites", str(SITES), "--seed", str(SEED), "--bench-errors",
                                       str(BENCH_SEED), "--speed", "20", "--out", str(out), "--lot", "ST-1"])
    assert result.exit_code == 0, result.output
    return out


def _figure(report, name):
    return next(f for f in report.figures if f.name == name)


def test_study_folder_is_a_datalog_marked_as_a_study(study):
    lot = json.loads((study / "lot.json").read_text())
    assert lot["study"] == {"parts": PARTS, "repeats": REPEATS, "sites": SITES, "reseat": True, "indexes": 12}
    assert len(lot["dry_run"]["bench_errors"]["site_offset_v"]) == SITES
    parts = (study / "parts.csv").read_text().splitlines()[1:]
    assert len(parts) == PARTS * REPEATS * SITES       # every part in every site, every repeat


def test_an_interrupted_study_is_not_resumed_as_a_lot(study, tmp_path):
    import shutil

    copy = tmp_path / "cut"
    shutil.copytree(study, copy)
    (copy / "manifest.json").unlink()
    lot = json.loads((copy / "lot.json").read_text())
    lot["complete"] = False
    (copy / "lot.json").write_text(json.dumps(lot))
    result = CliRunner().invoke(main, ["dry-run", "--resume", str(copy)])
    assert result.exit_code == 2 and "not resumed" in result.output


def test_study_recovers_the_bench_site_offsets_and_repeatability(study):
    lot = json.loads((study / "lot.json").read_text())
    truth = lot["dry_run"]["bench_errors"]
    report = study_report(load_study([study]), None)
    vos = _figure(report, "vos")
    anova = vos.anova
    assert (anova.parts, anova.appraisers, anova.repeats) == (PARTS, SITES, REPEATS)
    population = make_population(SEED, PARTS, defects=False)
    # Repeatability: one Vos is the mean of 4 readings at 1 NPLC, 50 Hz (the demo sequence), so
    # its true sigma is the model's per-reading noise / 2. s^2 / sigma^2 ~ chi2(df) / df:
    # 99.9 % bounds from scipy.stats.chi2.
    sigma2 = float(np.mean([expected_noise_rti(1.0, 50.0, p, dmm_range=10.0, autozero=False) ** 2
                            for p in population])) / 4.0
    df = anova.error.df
    ratio = anova.components.repeatability / sigma2
    assert stats.chi2.ppf(0.0005, df) / df < ratio < stats.chi2.ppf(0.9995, df) / df
    # Site means against the bench's truth: (1 + gain error) x (part's Vos + site offset),
    # averaged over the parts; the residual is noise with standard error sigma / sqrt(p r).
    se = math.sqrt(sigma2 / (PARTS * REPEATS))
    for site in range(1, SITES + 1):
        gain = 1.0 + truth["dmm_gain_error"][site - 1]
        expected = np.mean([gain * (vos_true(p, 0.0, 10.0) + truth["site_offset_v"][site - 1])
                            for p in population])
        assert anova.appraiser_means[f"site {site}"] == pytest.approx(expected, abs=4.5 * se)
    # The site term is what the offsets spread: the estimated site sigma is of their size.
    spread = float(np.std(truth["site_offset_v"], ddof=1))
    assert 0.3 * spread < math.sqrt(anova.components.appraiser) < 3.0 * spread


def test_study_finds_the_fixture_leakage_as_a_cmrr_slope_per_site(study):
    truth = json.loads((study / "lot.json").read_text())["dry_run"]["bench_errors"]["leakage_slope_vv"]
    low = _figure(study_report(load_study([study]), None), "cmrr low").anova
    # The same parts in every site: site means differ by the leakage slopes only (plus noise).
    se = math.sqrt(low.components.repeatability / (PARTS * REPEATS) + low.components.interaction / PARTS)
    bound = stats.t.ppf(0.9995, low.error.df) * se * math.sqrt(2)   # a difference of two means
    measured = [low.appraiser_means[f"site {k}"] for k in range(1, SITES + 1)]
    for k in range(1, SITES):
        assert measured[k] - measured[0] == pytest.approx(truth[k] - truth[0], abs=bound)


def test_report_command_prints_verdicts_and_writes_html(study, tmp_path):
    page = tmp_path / "study.html"
    result = CliRunner().invoke(main, ["study", "report", str(study), "--html", str(page)])
    assert result.exit_code == 0, result.output
    for text in ("Variance components", "cmrr low", "%GRR", "acceptable", "slope in V/V"):
        assert text in result.output
    body = page.read_text()
    assert body.count("data:image/png;base64,") >= 2 * 9 and "vos (studied as vos)" in body


def test_report_refuses_a_folder_that_is_not_a_study(tmp_path):
    out = tmp_path / "lot"
    assert CliRunner().invoke(main, ["dry-run", "--parts", "4", "--speed", "20", "--out", str(out)]).exit_code == 0
    result = CliRunner().invoke(main, ["study", "report", str(out)])
    assert result.exit_code == 2 and "not a study" in result.output


def test_two_stations_merge_into_station_site_appraisers(study, tmp_path):
    other = tmp_path / "s2"
    result = CliRunner().invoke(main, ["study", "run", "--parts", str(PARTS), "--repeats", str(REPEATS),
                                       "--sites", "2", "--seed", str(SEED), "--bench-errors", "12",
                                       "--station", "bench-7", "--speed", "20", "--out", str(other)])
    assert result.exit_code == 0, result.output
    report = study_report(load_study([study, other]), None)
    assert report.appraiser_kind == "station/site" and report.stations == ["bench-7", "sim-bench"]
    vos = _figure(report, "vos").anova
    assert vos.appraisers == SITES + 2 and "bench-7/site 2" in vos.appraiser_means


def test_a_measurement_missing_from_a_real_study_drops_that_part_and_says_so(study):
    from station.qualify.study_view import notes

    logs = load_study([study])
    rows = logs.results
    victim = rows[(rows["PARAM"] == "vos") & (rows["PART_ID"] == "D00002") & (rows["SITE_NUM"] == 3)].index[0]
    logs.results = rows.drop(index=victim)       # as if that seat had failed contact
    report = study_report(logs, None)
    vos = _figure(report, "vos")
    assert vos.balanced.dropped_parts == ("D00002",) and vos.anova.parts == PARTS - 1
    assert _figure(report, "iq").anova.parts == PARTS          # other figures keep every part
    assert any("vos: part(s) D00002 left out" in line for line in notes(report))

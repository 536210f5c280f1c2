"""Guard-band arithmetic and `station limits guard` on a study."""

from __future__ import annotations

import math

import pytest
from click.testing import CliRunner
from scipy.stats import norm

from station.cli.main import DEMO_LIMITS, main
from station.config.limit_tables import load_limit_table
from station.qualify.guard import (
    acceptance_db,
    acceptance_limits,
    conformance_probability,
    guard_width,
)


def test_specific_risk_at_the_guarded_limit_is_one_minus_phi_of_k():
    # 1 - Phi(2) = 0.02275 (scipy.stats.norm; JCGM 106:2012, from memory)
    assert 1 - norm.cdf(2.0) == pytest.approx(0.02275, abs=5e-6)
    u, k, spec = 1e-6, 2.0, 50e-6
    _, high = acceptance_limits(-spec, spec, guard_width(u, k, "guarded"))
    assert high == pytest.approx(48e-6)
    # A part measured at the acceptance limit conforms with probability Phi(2).
    assert 1 - conformance_probability(high, u, high=spec) == pytest.approx(1 - norm.cdf(2.0))
    # At the spec limit itself: one chance in two (the normal model is symmetric).
    assert conformance_probability(spec, u, high=spec) == pytest.approx(0.5)
    assert conformance_probability(-spec, u, low=-spec, high=spec) == pytest.approx(0.5, abs=1e-12)


def test_acceptance_limits_for_given_u_and_k():
    assert acceptance_limits(300e-6, 600e-6, guard_width(2e-6, 3.0, "guarded")) == pytest.approx((306e-6, 594e-6))
    assert acceptance_limits(None, 150e-6, guard_width(1e-6, 2.0, "guarded")) == (None, pytest.approx(148e-6))
    assert guard_width(1e-6, 2.0, "simple") == 0.0
    # 120 dB is |slope| <= 1e-6; a guard of 0.1e-6 leaves 0.9e-6: -20 log10(0.9e-6) = 120.915 dB.
    assert acceptance_db(120.0, 0.1e-6) == pytest.approx(-20 * math.log10(0.9e-6))
    assert acceptance_db(120.0, 1e-6) is None      # the guard takes the whole window


@pytest.fixture(scope="module")
def study(tmp_path_factory):
    out = tmp_path_factory.mktemp("gstudy") / "s"
    result = CliRunner().invoke(main, ["study", "run", "--parts", "3", "--repeats", "2", "--sites", "2",
                                       "--bench-errors", "4", "--speed", "20", "--out", str(out)])
    assert result.exit_code == 0, result.output
    return out


def test_guard_command_writes_acceptance_and_spec_limits(study, tmp_path):
    from station.qualify.study import load_study, study_report

    out = tmp_path / "guarded.yaml"
    result = CliRunner().invoke(main, ["limits", "guard", str(DEMO_LIMITS), "--study", str(study), "--k", "2",
                                       "--out", str(out)])
    assert result.exit_code == 0, result.output
    spec, guarded = load_limit_table(DEMO_LIMITS), load_limit_table(out)
    grr = {f.name: f.anova.components.grr for f in study_report(load_study([study]), spec).figures}
    vos = next(lim for lim in guarded.grades[0].limits if lim.param == "vos")
    assert vos.spec == (-50e-6, 50e-6)
    assert vos.high == pytest.approx(50e-6 - 2 * grr["vos"], abs=1e-10)   # rounded inwards to 0.1 nV
    assert vos.high <= 50e-6 - 2 * grr["vos"] and vos.guard_k == 2.0
    cmrr = next(lim for lim in guarded.grades[0].limits if (lim.param, lim.region) == ("cmrr", "low"))
    assert cmrr.spec_low == 120.0
    assert cmrr.low == pytest.approx(-20 * math.log10(1e-6 - 2 * grr["cmrr low"]), abs=1e-3)
    assert guarded.changes[-1]["what"] == "guard bands"
    shown = CliRunner().invoke(main, ["limits", "show", str(out), "--grade", "A"])
    assert "spec low" in shown.output and "k 2, u " in shown.output
    # The datalog keeps the acceptance limit in LO_LIMIT/HI_LIMIT: a dry run with the table.
    lot = tmp_path / "lot"
    run = CliRunner().invoke(main, ["dry-run", "--parts", "4", "--speed", "20", "--limits", str(out), "--out", str(lot)])
    assert run.exit_code == 0, run.output
    import pandas as pd

    rows = pd.read_csv(lot / "results.csv")
    # Each row logs the limit of the grade it was judged against; every grade is guarded.
    acceptance = {g.name: next(lim for lim in g.limits if lim.param == "vos").high for g in guarded.grades}
    logged = rows[(rows["PARAM"] == "vos") & rows["GRADE"].isin(list(acceptance))]
    assert len(logged) > 0
    for row in logged.itertuples():
        assert row.HI_LIMIT == pytest.approx(acceptance[row.GRADE])
    assert acceptance["A"] == vos.high
    # STDF: acceptance in LO_LIMIT/HI_LIMIT, spec in the PTR's LO_SPEC/HI_SPEC (read by pystdf).
    from station.datalog.stdf_export import write_stdf
    from tests.support.stdf_helpers import of_type, read_stdf

    ptrs = of_type(read_stdf(write_stdf(lot)), "Ptr")
    vos_num = int(rows[(rows["PARAM"] == "vos")]["TEST_NUM"].iloc[0])
    first = next(p for p in ptrs if p["TEST_NUM"] == vos_num)
    grade = next(g for g in guarded.grades if g.name == rows[rows["PARAM"] == "vos"]["GRADE"].iloc[0])
    logged_vos = next(lim for lim in grade.limits if lim.param == "vos")   # the first part's grade
    assert first["HI_LIMIT"] == pytest.approx(logged_vos.high, rel=1e-6)
    assert (first["LO_SPEC"], first["HI_SPEC"]) == pytest.approx(logged_vos.spec, rel=1e-6)
    assert first["OPT_FLAG"] & 0x0C == 0          # bits 2/3 clear: both spec limits valid


def test_guard_warns_when_it_takes_too_much_of_a_tolerance(study, tmp_path):
    result = CliRunner().invoke(main, ["limits", "guard", str(DEMO_LIMITS), "--study", str(study), "--k", "2",
                                       "--max-share", "0.0001", "--out", str(tmp_path / "g.yaml")])
    assert result.exit_code == 0 and "WARNING: grade A vos: guard takes" in result.output

"""`station bench check` on the simulated bench: a healthy bench passes every line; each
simulator fault mode fails exactly the line that names it (and what that line guards is not
run after it); nothing is ever driven beyond the bench config's safety limits."""

from __future__ import annotations

import re
from collections.abc import Iterator

import pytest
from click.testing import CliRunner

from station.cli.main import main
from station.config.bench_config import parse_bench_config
from station.errors import EXIT_CHECK_FAILED
from station.lot.bench_check import FAIL, PASS, SKIP, BenchCheck

sim_bench = pytest.importorskip("sim_instruments.bench")
from sim_instruments.serve import apply_fault  # noqa: E402

# Short timeouts: a fault that swallows a reply costs 0.5 s, not 5.
FAST = ("timeout: 5 s", "timeout: 0.5 s")


@pytest.fixture(scope="module", params=sim_bench.TRANSPORTS)
def sim(request) -> Iterator[object]:
    settings = sim_bench.SimSettings(seed=2, sites=2, parts=8, speed=20.0, transport=request.param,
                                     log_commands=True)
    with sim_bench.SimBench(settings) as running:
        yield running


def _run(sim, text: str | None = None):
    sim.clear_faults()
    config = parse_bench_config((text or sim.bench_config_text()).replace(*FAST), "sim-bench.yaml")
    return BenchCheck(config).run()


def test_a_healthy_bench_passes_every_line(sim, tmp_path):
    bench_file = tmp_path / "bench.yaml"
    bench_file.write_text(sim.bench_config_text().replace(*FAST), encoding="utf-8")
    result = CliRunner().invoke(main, ["bench", "check", "--bench", str(bench_file)])
    assert result.exit_code == 0, result.output
    lines = [line for line in result.output.splitlines() if re.match(r"(PASS|FAIL|SKIP) ", line)]
    names = {line[6:32].strip() for line in lines}
    roles = ("supply", "force", "dmm1", "dmm2", "switch", "handler")
    assert {f"identity {r}" for r in roles} | {f"error queue {r}" for r in roles} <= names
    assert {"relay 101", "relay 102", "relay 301", "relay 302", "relay 401", "relay 402",
            "dmm1 shorted input", "dmm2 shorted input", "supply read-back", "handler sites",
            "outputs off supply", "outputs off force", "*RST defaults dmm2"} <= names
    assert not [line for line in lines if line.startswith("FAIL")]
    # The only line not run is the reference: our fixture has none.
    assert [line[6:32].strip() for line in lines if line.startswith("SKIP")] == ["DMM reference"]
    assert sim.state()["supply"]["ch1"]["output"] is False and sim.state()["relays_closed"] == []


# (role, fault, value, the lines it must fail). A live output stuck on also leaves the safe
# state unconfirmed, as it must; the relays are then not switched at all.
FAULTS = [
    ("dmm1", "offset", 0.001, {"dmm1 shorted input"}),
    ("supply", "readback", 0.1, {"supply read-back"}),
    ("switch", "stuck", 302, {"relay 302"}),
    ("dmm2", "noreset", 1, {"*RST defaults dmm2"}),
    ("supply", "noreset", 1, {"*RST defaults supply"}),
    ("force", "noreset", 1, {"*RST defaults force"}),
    ("switch", "noreset", 1, {"*RST defaults switch"}),
    ("force", "error", -222, {"error queue force"}),
    ("dmm1", "timeout", 1, {"identity dmm1"}),
    ("switch", "garbage", 1, {"identity switch"}),
    ("handler", "drop", 0, {"identity handler"}),
    ("supply", "hot", 1, {"outputs off supply", "safe state"}),
    ("force", "hot", 1, {"outputs off force", "safe state"}),
]


@pytest.mark.parametrize(("role", "kind", "value", "expected"), FAULTS,
                         ids=[f"{r}:{k}" for r, k, _, _ in FAULTS])
def test_each_fault_fails_exactly_its_line(sim, role, kind, value, expected):
    sim.clear_faults()
    apply_fault(sim, role, kind, float(value))
    config = parse_bench_config(sim.bench_config_text().replace(*FAST), "sim-bench.yaml")
    results = BenchCheck(config).run()
    sim.clear_faults()
    assert {r.name for r in results if r.outcome == FAIL} == expected
    failed = [r for r in results if r.outcome == FAIL]
    assert all(r.advice for r in failed)                # every failure says what to do
    if "identity" in next(iter(expected)):
        # An instrument that did not identify is not checked further.
        skipped = {r.name for r in results if r.outcome == SKIP}
        assert f"error queue {role}" in skipped


def test_never_beyond_the_safety_limits(sim):
    text = sim.bench_config_text().replace("max_rail: 12 V", "max_rail: 2 V")
    del sim.command_log[:]
    results = _run(sim, text)
    readback = next(r for r in results if r.name == "supply read-back")
    assert readback.outcome == PASS and "+-2 V" in readback.detail
    # Every level the check sent the supply, by any command set, stayed within 2 V.
    levels = []
    for record in sim.command_log:
        if record.role == "supply":
            levels += [float(v) for v in re.findall(r"(?:VOLT|APPL CH\d,)\s*([-+0-9.eE]+)", record.message)]
    assert levels and max(abs(v) for v in levels) <= 2.0


def test_the_exit_code_says_a_check_failed(sim, tmp_path):
    bench_file = tmp_path / "bench.yaml"
    bench_file.write_text(sim.bench_config_text().replace(*FAST), encoding="utf-8")
    sim.clear_faults()
    apply_fault(sim, "switch", "stuck", 101)
    result = CliRunner().invoke(main, ["bench", "check", "--bench", str(bench_file)])
    sim.clear_faults()
    assert result.exit_code == EXIT_CHECK_FAILED
    assert re.search(r"^FAIL  relay 101 .* -> relay 101 or its wiring is faulty", result.output, re.M)

"""The simulated fixture that breaks mid-lot: parsing, contact loss from part k, growing leakage."""

from __future__ import annotations

import pytest

from sim_instruments.bench import SimBench, SimSettings
from sim_instruments.fixture_faults import contact_broken, leakage_a, parse_fixture_fault


def test_parse_and_describe() -> None:
    fault = parse_fixture_fault("leakage:3@100:5uA")
    assert (fault.kind, fault.site, fault.from_part, fault.step_a) == ("leakage", 3, 100, pytest.approx(5e-6))
    assert parse_fixture_fault(fault.text()).step_a == pytest.approx(fault.step_a)
    assert parse_fixture_fault("contact:2@40").text() == "contact:2@40"
    for bad in ("contact:2", "leak:1@3", "leakage:1@3", "contact:0@5"):
        with pytest.raises(ValueError):
            parse_fixture_fault(bad)


def test_contact_lost_from_part_k_on_its_site_only() -> None:
    faults = (parse_fixture_fault("contact:2@40"),)
    assert not contact_broken(faults, 2, 38)       # part 39
    assert contact_broken(faults, 2, 39) and contact_broken(faults, 2, 500)
    assert not contact_broken(faults, 1, 100)


def test_leakage_grows_part_by_part_and_is_seeded() -> None:
    faults = (parse_fixture_fault("leakage:1@10:2uA"),)
    values = [leakage_a(faults, 1, i, seed=4) for i in range(8, 40)]
    assert values[0] == 0.0 and values[1] > 0          # from part 10 (index 9) on
    assert values[-1] > 20 * values[1]                 # grows with every part
    assert values == [leakage_a(faults, 1, i, seed=4) for i in range(8, 40)]
    assert leakage_a(faults, 2, 30, seed=4) == 0.0


def test_handler_seats_the_broken_site_without_contact() -> None:
    settings = SimSettings(seed=2, sites=2, parts=8, defects=False,
                           fixture_faults=(parse_fixture_fault("contact:1@5"),
                                           parse_fixture_fault("leakage:2@3:10uA")))
    sim = SimBench(settings)
    handler = sim.instruments["handler"]
    seen = []
    for _ in range(4):
        handler._next()  # type: ignore[attr-defined]
        seen.append((list(sim.model.contact), list(sim.model.leak_a)))
        for site in (1, 2):
            handler._bin(site, 1)  # type: ignore[attr-defined]
    assert [c for c, _ in seen] == [[True, True], [True, True], [False, True], [False, True]]
    assert seen[0][1][1] == 0.0 and seen[1][1][1] > 0 and seen[3][1][1] > seen[1][1][1]

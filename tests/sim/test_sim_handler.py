"""Handler sequencing through pyvisa-py: ids in lot order, empty sites, END, bins, reseat."""

from __future__ import annotations

import time

import pytest

from sim_instruments.bench import SimBench, SimSettings
from sim_instruments.population import make_part
from sim_instruments.visa_client import close_all, open_all


def test_lot_sequence_bins_and_end():
    with SimBench(SimSettings(speed=20, sites=4, parts=10, handler_index_s=0.01)) as sim:
        res = open_all(sim)
        handler = res["handler"]
        assert handler.query("HANDler:SITes?") == "4"
        assert handler.query("HANDler:COUNt?") == "10"
        seen: list[str] = []
        first = handler.query("HANDler:NEXT?").split(",")
        assert first == ["D00001", "D00002", "D00003", "D00004"]
        # not binned yet: the query fails with -221 and gives no reply of its own (code and text:
        # SCPI-1999 vol. 2, 21.8; from memory)
        assert handler.query("HANDler:NEXT?;:SYST:ERR?") == '-221,"Settings conflict"'
        index = first
        while index != ["END"]:
            seen += [p for p in index if p != "-"]
            for site, part in enumerate(index, start=1):
                if part != "-":
                    handler.write(f"HANDler:BIN {site},{1 + site % 2}")
            index = handler.query("HANDler:NEXT?").split(",")
            if index != ["END"] and len(seen) == 8:
                assert index == ["D00009", "D00010", "-", "-"]
        assert seen == [f"D{i:05d}" for i in range(1, 11)]  # each id exactly once
        assert handler.query("HANDler:NEXT?") == "END"
        assert handler.query("HANDler:COUNt?") == "0"
        assert handler.query("HAND:BIN:COUN? 2") == "5"  # sites 1 and 3
        assert handler.query("HAND:BIN:COUN? 1") == "5"
        handler.write("HANDler:BIN 1,100")  # bins 1-99 are the simulated handler's own range
        assert handler.query("SYST:ERR?").startswith("-222")
        close_all(res)
    bins = {p.part_id: p.binned_hard_bin for p in sim.truth()}
    assert bins["D00001"] == 2 and bins["D00002"] == 1 and bins["D00010"] == 1


def _seed_with_curable_open() -> int:
    for seed in range(1, 5000):
        part = make_part(seed, 0)
        if part.defect == "open" and part.reseat_fixes:
            return seed
    raise AssertionError("no seed with a curable open first part")


def test_reseat_cures_an_open_part_that_allows_it():
    seed = _seed_with_curable_open()
    with SimBench(SimSettings(seed=seed, speed=20, sites=1, parts=2, handler_index_s=0.01)) as sim:
        res = open_all(sim)
        res["handler"].query("HANDler:NEXT?")
        res["supply"].write("INST:NSEL 1;:VOLT 5;:OUTP ON;:INST:NSEL 2;:VOLT -5;:OUTP ON")
        res["switch"].write("ROUT:CLOS (@101)")
        time.sleep(0.3 / 20)
        dmm = res["dmm1"]
        # SCPI overload value (SCPI-1999 vol. 1; from memory)
        assert dmm.query("READ?") == "+9.90000000E+37"
        assert float(res["supply"].query("INST:NSEL 1;:MEAS:CURR?")) < 5e-6  # Iq ~ 0: no contact
        res["handler"].write("HANDler:RESeat 1")
        time.sleep(0.5 / 20)
        assert dmm.query("READ?") != "+9.90000000E+37"
        iq = float(res["supply"].query("MEAS:CURR?"))
        close_all(res)
    assert iq == pytest.approx(sim.truth()[0].iq(10.0), abs=1e-6)

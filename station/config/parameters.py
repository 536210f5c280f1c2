"""The parameters the station measures: their names, units, and which regions they take.

One table, used by the limit-table loader (what may be limited), the sequencer (what it
produces) and the datalog (PARAM and UNITS columns).
"""

from __future__ import annotations

from dataclasses import dataclass


@dataclass(frozen=True)
class ParameterInfo:
    name: str
    units: str          # units of RESULT in the datalog and of limits in tables
    region_kind: str | None  # None: no region; "slope": slope regions (+ "full"); "step": transition
    #                          regions; "application": an application of the sequence's budget step;
#                          "frequency": a frequency point of the sequence's ac_cmrr step ("1 kHz")
    limitable: bool
    description: str


FULL_RANGE = "full"  # pseudo-region: end-point slope over the whole common-mode sweep

PARAMETERS: dict[str, ParameterInfo] = {p.name: p for p in [
    ParameterInfo("iq", "A", None, True, "quiescent supply current at nominal supply"),
    ParameterInfo("vos", "V", None, True, "input offset voltage at nominal supply, mid common-mode"),
    ParameterInfo("cmrr", "dB", "slope", True, "common-mode rejection of a region, -20 log10 |dVos/dVcm|"),
    ParameterInfo("cm_step", "V", "step", True, "offset step across a transition region (max - min Vos)"),
    ParameterInfo("vos_worst", "V", "step", True, "worst |Vos| inside a transition region"),
    ParameterInfo("aol", "dB", None, True, "open-loop gain, 20 log10 |dVout/dVos|"),
    ParameterInfo("psrr", "dB", None, True, "supply rejection, -20 log10 |dVos/dVs|"),
    ParameterInfo("ib_plus", "A", None, True, "input bias current of the + input (into the pin positive)"),
    ParameterInfo("ib_minus", "A", None, True, "input bias current of the - input (into the pin positive)"),
    ParameterInfo("ib", "A", None, True, "input bias current, mean of the two inputs"),
    ParameterInfo("ios", "A", None, True, "input offset current Ib+ - Ib-"),
    ParameterInfo("cmrr_da", "dB", "slope", True,
                  "common-mode rejection of a region in the difference-amplifier fixture (its own term subtracted)"),
    ParameterInfo("cmrr_ac", "dB", "frequency", True,
                  "common-mode rejection at one frequency point, difference amplifier, 20 log10(G Vin / Vout)"),
    ParameterInfo("cmrr_ac_f3db", "Hz", None, True,
                  "frequency where CMRR has fallen 3 dB below its value at the lowest frequency point"),
    ParameterInfo("app_err", "V", "application", True, "application error budget, direct sum of its terms (RTI)"),
    ParameterInfo("app_err_rss", "V", "application", True, "application error budget, root sum of squares (RTI)"),
    # Informational rows: logged for offline analysis, never limited.
    ParameterInfo("app_err_vos", "V", "application", False, "budget term: offset at the application's common mode"),
    ParameterInfo("app_err_cm", "V", "application", False, "budget term: offset change over the input range"),
    ParameterInfo("app_err_out", "V", "application", False, "budget term: output swing / AOL"),
    ParameterInfo("app_err_ib", "V", "application", False, "budget term: bias current x source resistance"),
    ParameterInfo("ios_both", "A", None, False, "Ios from the reading with both Rb in (consistency check)"),
    ParameterInfo("vos_rb", "V", None, False, "raw loop offset with Rb in series with none, one or both inputs"),
    ParameterInfo("cmrr_slope", "V/V", "slope", False, "signed least-squares slope dVos/dVcm of a region"),
    ParameterInfo("cmrr_da_slope", "V/V", "slope", False, "signed slope dVos/dVcm of a region, difference amplifier"),
    ParameterInfo("vac_da", "V", "frequency", False, "raw AC amplitude (RMS) at the difference amplifier's output"),
    ParameterInfo("vos_da", "V", "point", False, "raw Vos at one drive level of the difference amplifier"),
    ParameterInfo("aol_slope", "V/V", None, False, "signed slope dVos/dVout"),
    ParameterInfo("psrr_slope", "V/V", None, False, "signed slope dVos/dVs"),
    ParameterInfo("vos_cm", "V", "point", False, "raw Vos at one common-mode point"),
    ParameterInfo("vos_force", "V", None, False, "raw Vos at one commanded output level"),
    ParameterInfo("vos_span", "V", None, False, "raw Vos at one supply span"),
    ParameterInfo("contact_iq", "A", None, False, "supply current of the contact check"),
]}

LIMITABLE = {name for name, info in PARAMETERS.items() if info.limitable}

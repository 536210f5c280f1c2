"""The physics floor of one handler index: the least time the bench itself needs.

Computed from the simulator's own constants and the parts' true settling parameters
(sim_instruments/model.py: settle_time_to, expected_noise_rti, thermal_step_v, slew and relay
times), following the station's path through the sequence (station/sweep_order):

- contact: one relay operation per site, plus a handler re-seat for a part that fails it;
- every bench condition of a sweep: the rails' slew, then the settling each live part needs
  until its error stays below the noise of that condition's result (one reading's RMS noise
  over sqrt(samples)); the slowest live part sets the time, as the sites share the rails;
  then the integration of the samples (doubled with autozero). Each condition is taken to
  start from the previous one fully settled, its target step and thermal step measured from
  the last condition that was read;
- Iq: one relay operation per site, plus the rails' slew back to nominal;
- bias current: per Rb state (in the station's visiting order) one relay operation, then
  each live part's settling through Rb x C and the dielectric tail down to the noise of a
  reading with that Rb in series, then the integration; one relay to shunt Rb again.
Handler index time is not in the floor (it is not test time); the station's own round trips,
computation and datalog writing are what the floor leaves out.
"""

from __future__ import annotations

import math
from dataclasses import dataclass

from sim_instruments.model import (
    DEFAULT_RB_OHM,
    FORCE_SETTLE_START_S,
    RELAY_OPERATE_S,
    SATURATED_NODE_V,
    SLEW_V_PER_S,
    bias_offset_rti,
    bias_settle_time_to,
    expected_noise_rti,
    loop_gain,
    settle_time_to,
    thermal_step_v,
    vos_true,
)
from sim_instruments.population import PartTruth
from station.config.rail_points import rails_for
from station.config.sequence import Sequence, TestStep
from station.kinds.base import SweepKind
from station.kinds.bias_current import STATES, VISIT
from station.kinds.registry import kind_of
from station.lot.sweep_order import visit_order

State = tuple[float, float, float]  # (V+, V-, Vout)


@dataclass(frozen=True)
class FloorBench:
    rf_ohm: float = 100e3
    rs_ohm: float = 100.0
    line_hz: float = 50.0
    handler_index_s: float = 0.2
    rb_ohm: float = DEFAULT_RB_OHM


def conditions_of(step: TestStep, span: float) -> list[tuple[tuple[float, float], float]]:
    """The step's bench conditions ((V+, V-), force): its kind's own (station/kinds)."""
    kind = kind_of(step)
    return kind.conditions(step, span) if isinstance(kind, SweepKind) else []


def index_floor(sequence: Sequence, parts: list[PartTruth], bench: FloorBench,
                waits: list[float] | None = None) -> float:
    """Floor of one index holding `parts` (one per site), in seconds; `waits` collects the
    settling (slew included) each condition needs."""
    contact_ok = [p for p in parts if _contacts(p)]
    live = [p for p in contact_ok if not math.isfinite(p.short_ohm)]
    span = sequence.span_v
    gain = loop_gain(bench.rf_ohm, bench.rs_ohm)
    total = 0.0
    nominal = rails_for(0.0, span)
    # Last read condition and each live part's input-referred error target there; a part
    # starts unpowered, its node at the servo integrator's clamp.
    state: State = (0.0, 0.0, 0.0)      # what the parts' thermal tails last saw
    bench_at: State = (*nominal, 0.0)    # what the sources are set to
    targets = {p.part_id: SATURATED_NODE_V / gain for p in live}
    for step in sequence.tests:
        if step.kind == "contact":
            total += RELAY_OPERATE_S * len(parts)
            total += sum(bench.handler_index_s / 2 + RELAY_OPERATE_S for p in parts if p.defect == "open")
            total += RELAY_OPERATE_S  # the live sites powered together
            continue
        if step.kind == "supply_current":
            total += RELAY_OPERATE_S * (len(live) + 1) + _slew(bench_at, (*nominal, bench_at[2]))
            continue
        if not live:
            continue
        if step.kind == "bias_current":
            total += _slew(bench_at, (*nominal, 0.0)) + _bias_floor(step, sequence, live, bench, waits)
            bench_at = (*nominal, 0.0)
            continue
        conditions = conditions_of(step, span)
        for i in visit_order(conditions, ((bench_at[0], bench_at[1]), bench_at[2])):
            (v_pos, v_neg), force = conditions[i]
            new: State = (v_pos, v_neg, force)
            wait = 0.0
            for part in live:
                noise = expected_noise_rti(step.nplc, bench.line_hz, part, bench.rf_ohm, bench.rs_ohm,
                                           sequence.dmm_range_v, sequence.autozero)
                target = vos_true(part, -(v_pos + v_neg) / 2.0, v_pos - v_neg, force)
                step_rti = targets[part.part_id] - target   # old - new error, decays with tau_fast
                rail_step = thermal_step_v(state, new)       # drives the thermal tail
                wait = max(wait, settle_time_to(noise / math.sqrt(step.average), step_rti, part, rail_step))
                targets[part.part_id] = target
            start = FORCE_SETTLE_START_S if force != bench_at[2] else 0.0
            settling = max(_slew(bench_at, new), start) + wait
            total += settling + _integration(step, sequence, bench)
            if waits is not None:
                waits.append(settling)
            state = bench_at = new
        # The sweep returns the force to zero; that step joins the next condition's (linear).
        bench_at = (bench_at[0], bench_at[1], 0.0)
    return total


def _bias_floor(step: TestStep, sequence: Sequence, live: list[PartTruth], bench: FloorBench,
                waits: list[float] | None) -> float:
    """Rb in and out in the kind's own order: each state from the one before, fully settled."""
    total = 0.0
    before = {p.part_id: 0.0 for p in live}    # bias offset of the last state (Rb shunted)
    for i in VISIT:
        plus, minus = STATES[i]
        rb_in = bench.rb_ohm * (plus + minus)
        wait = 0.0
        for part in live:
            noise = expected_noise_rti(step.nplc, bench.line_hz, part, bench.rf_ohm, bench.rs_ohm,
                                       sequence.dmm_range_v, sequence.autozero, rb_in)
            now = bias_offset_rti(part, bench.rb_ohm * plus, bench.rb_ohm * minus)
            wait = max(wait, bias_settle_time_to(noise / math.sqrt(step.average), before[part.part_id] - now,
                                                 part, bench.rb_ohm))
            before[part.part_id] = now
        settling = RELAY_OPERATE_S + wait
        total += settling + _integration(step, sequence, bench)
        if waits is not None:
            waits.append(settling)
    return total + RELAY_OPERATE_S


def _contacts(part: PartTruth) -> bool:
    return part.defect != "open" or part.reseat_fixes


def _slew(before: State, after: State) -> float:
    return max(abs(after[0] - before[0]), abs(after[1] - before[1])) / SLEW_V_PER_S


def _integration(step: TestStep, sequence: Sequence, bench: FloorBench) -> float:
    per_sample = step.nplc / bench.line_hz * (2.0 if sequence.autozero else 1.0)
    return per_sample * step.average


def worst_case_wait(sequence: Sequence, parts: list[PartTruth], bench: FloorBench, step_s: float = 0.01) -> float:
    """The fixed wait a worst-case characterisation would give: the longest settling any
    condition needs for any of `parts`, rounded up to `step_s`."""
    waits: list[float] = []
    for part in parts:
        index_floor(sequence, [part], bench, waits)
    return math.ceil(max(waits) / step_s) * step_s if waits else 0.0

"""The application error budget: check values of the trade, the common-mode term from the
part's own swept points (crossover counted in full), referring another supply, and the
application file's one-line errors."""

from __future__ import annotations

import math
import textwrap

import numpy as np
import pytest

from station.config.applications import parse_applications
from station.config.files import ConfigError
from station.judge.budget import Application, BudgetError, PartFigures, part_budget, refer_to_tested

SPAN = 10.0
GRID = tuple(float(v) for v in np.linspace(-5.1, 5.1, 52))


def _part(curve, vos: float = 0.0, aol: float = math.inf, ib_plus: float = 0.0, ib_minus: float = 0.0):
    points = tuple((v, vos + curve(v) - curve(0.0)) for v in GRID)
    return PartFigures(vos=vos, aol_slope=0.0 if math.isinf(aol) else 1.0 / aol, cm_points=points,
                       ib_plus=ib_plus, ib_minus=ib_minus)


def _app(circuit="buffer", inputs=(-5.0, 5.0), gain=1.0, supply=(-5.0, 5.0), source=0.0,
         output=None, reference=0.0) -> Application:
    if output is None:
        output = (gain * inputs[0], gain * inputs[1])
    return Application("app", circuit, gain, supply, inputs, source, output, reference)


def test_aol_term_check_value():
    # common practice, no source: AOL 6.25e6 V/V over a 10 V output change is 1.6 uV input-referred
    budget = part_budget(_app(), _part(lambda v: 0.0, aol=6.25e6), SPAN)
    assert budget.out == pytest.approx(1.6e-6, rel=1e-12)


def test_buffer_direct_sum_and_rss_check_values():
    # common practice, no source: 2 uV of CMRR error and 1.6 uV of AOL error in a buffer add
    # to 3.6 uV worst case, 2.56 uV RSS. A CMRR of 0.2 uV/V over the 10 V range gives the 2 uV;
    # the part's offset is zero at the range's low end (1 uV at mid), so no offset term adds.
    budget = part_budget(_app(), _part(lambda v: 0.2e-6 * (v + 5.0), vos=1e-6, aol=6.25e6), SPAN)
    assert budget.vos == pytest.approx(0.0, abs=1e-15)
    assert budget.cm == pytest.approx(2e-6, rel=1e-9)
    assert budget.direct == pytest.approx(3.6e-6, rel=1e-9)
    assert budget.rss == pytest.approx(2.561e-6, abs=0.001e-6)
    assert budget.rss == pytest.approx(math.hypot(2e-6, 1.6e-6), rel=1e-12)


def test_inverting_stage_at_fixed_common_mode_has_no_cmrr_term():
    # common practice, no source: an inverting stage holds its common mode, so CMRR drops out
    steep = _part(lambda v: 3e-6 * v, aol=6.25e6)
    inverting = part_budget(_app("inverting", inputs=(-1.0, 1.0), gain=5.0, output=(-5.0, 5.0)), steep, SPAN)
    assert inverting.cm == 0.0
    assert inverting.out == pytest.approx(1.6e-6, rel=1e-12)
    buffer = part_budget(_app(inputs=(-1.0, 1.0)), steep, SPAN)
    assert buffer.cm == pytest.approx(6e-6, rel=1e-9)


def _crossover(step: float = 100e-6, centre: float = 3.7, slope: float = 0.1e-6):
    """Low-region slope, then a step of `step` across 3.4-4.0 V (the demo transition region)."""
    return lambda v: slope * v + step / (1.0 + math.exp(-(v - centre) / 0.05))


TRANSITION = [(3.4, 4.0)]


def test_a_range_through_the_crossover_contains_the_step():
    part = _part(_crossover(), vos=10e-6)
    crossing = part_budget(_app(inputs=(-4.0, 4.5)), part, SPAN, TRANSITION)
    assert crossing.cm > 100e-6 * 0.99


def test_a_range_in_the_low_region_does_not():
    part = _part(_crossover(), vos=10e-6)
    low = part_budget(_app(inputs=(-4.0, 2.0)), part, SPAN, TRANSITION)
    assert low.cm == pytest.approx(0.1e-6 * 6.0, rel=0.02)   # the slope over 6 V only
    assert low.vos == pytest.approx(10e-6 - 0.4e-6, rel=0.02)  # the offset at the range's low end


def test_a_range_entering_the_transition_counts_the_whole_step():
    # ends at 3.5 V, inside the transition: the hand-over point varies, so the full step counts
    part = _part(_crossover(step=-120e-6), vos=0.0)
    budget = part_budget(_app(inputs=(0.0, 3.5)), part, SPAN, TRANSITION)
    assert budget.cm > 120e-6 * 0.97
    without = part_budget(_app(inputs=(0.0, 3.5)), part, SPAN)   # no region known: the range only
    assert without.cm < 10e-6


def test_bias_term_uses_the_input_the_source_drives():
    part = _part(lambda v: 0.0, ib_plus=3e-12, ib_minus=-7e-12)
    # 3 pA through 1 MOhm = 3 uV (V = I R)
    assert part_budget(_app(source=1e6), part, SPAN).ib == pytest.approx(3e-6)
    inverting = _app("inverting", inputs=(-0.5, 0.5), gain=2.0, source=1e6, output=(-1.0, 1.0))
    assert part_budget(inverting, part, SPAN).ib == pytest.approx(7e-6)


def test_another_supply_is_referred_by_distance_from_the_nearer_rail():
    supply = (0.0, 3.3)
    assert refer_to_tested(0.0, supply, SPAN) == pytest.approx(-5.0)     # on V-
    assert refer_to_tested(3.3, supply, SPAN) == pytest.approx(5.0)      # on V+
    assert refer_to_tested(2.3, supply, SPAN) == pytest.approx(4.0)      # 1 V below V+
    assert refer_to_tested(1.0, supply, SPAN) == pytest.approx(-4.0)     # 1 V above V-


def test_a_wider_supply_than_tested_is_refused():
    with pytest.raises(BudgetError, match="wider than"):
        part_budget(_app(supply=(-6.0, 6.0), inputs=(-1.0, 1.0)), _part(lambda v: 0.0), SPAN)


def test_no_extrapolation_beyond_the_sweep():
    narrow = PartFigures(0.0, 0.0, ((-1.0, 0.0), (0.0, 0.0), (1.0, 0.0)))
    with pytest.raises(BudgetError, match="outside the swept"):
        part_budget(_app(inputs=(-2.0, 0.5)), narrow, SPAN)


APPS = """\
applications:
  - name: buf33
    circuit: buffer
    supply: {low: 0 V, high: 3.3 V}
    input: {low: 0 V, high: 3.3 V}
    source_resistance: 10 kOhm
  - name: inv
    circuit: inverting
    gain: 5
    supply: {low: 0 V, high: 5 V}
    reference: 2.5 V
    input: {low: 2.1 V, high: 2.9 V}
"""


def test_application_file_reads_into_records():
    buf, inv = parse_applications(APPS, "apps.yaml")
    assert (buf.gain, buf.source_ohm, buf.output_v) == (1.0, 10e3, (0.0, 3.3))
    assert inv.output_v == pytest.approx((0.5, 4.5))    # 2.5 - 5 (vin - 2.5)
    assert inv.cm_range_v() == (2.5, 2.5)


@pytest.mark.parametrize(("change", "line", "what"), [
    (("circuit: buffer\n    supply: {low: 0 V", "circuit: bufer\n    supply: {low: 0 V"), 3, "circuit"),
    (("input: {low: 0 V, high: 3.3 V}", "input: {low: 0 V, high: 4 V}"), 5, "outside the supply"),
    (("gain: 5", "gain: -5"), 9, "gain"),
    (("source_resistance: 10 kOhm", "source_resistance: 10 kV"), 6, "not a unit of Ohm"),
    (("name: inv", "name: buf33"), 7, "named twice"),
    (("reference: 2.5 V", "reference: 2.5 V\n    colour: red"), 12, "unknown key"),
])
def test_bad_application_files_are_one_line_errors(change, line, what):
    text = APPS.replace(*change)
    with pytest.raises(ConfigError) as caught:
        parse_applications(text, "apps.yaml")
    message = str(caught.value)
    assert message.startswith(f"apps.yaml:{line}:"), message
    assert what in message and "\n" not in message


def test_an_output_beyond_the_supply_is_refused():
    text = textwrap.dedent("""\
        applications:
          - {name: g10, circuit: non_inverting, gain: 10, supply: {low: -5 V, high: 5 V},
             input: {low: -1 V, high: 1 V}}
        """)
    with pytest.raises(ConfigError, match="output swing"):
        parse_applications(text, "apps.yaml")

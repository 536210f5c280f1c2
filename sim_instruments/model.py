"""The physics of the simulated fixture: rails, servo loops, parts, and what the meters see.

One `BenchModel` holds the state of the shared sources, relays and seated parts. Every method
takes the model time explicitly, so the model is deterministic given the seed and the times
(the instruments pass their clock's time). All values are SI (V, A, s); node values are the
loop measurement node, i.e. G times the input-referred error, G = 1 + Rf/Rs.

Conventions (station/config/rail_points.py): DUT inputs sit at fixture ground, so the common-mode
voltage relative to the supply mid-point is VCM = -(V+ + V-)/2 and the span is S = V+ - V-.

Module-level helpers for benchmarks that compute the physics floor:
`loop_gain`, `vos_true`, `expected_noise_rti`, `dmm_own_noise`, `settle_time_to`.
Simplification (documented): the DUT output swing is not limited by the rails, because the
fixture holds it at the force level for every common-mode point the station uses.
"""

from __future__ import annotations

import math
import threading
from dataclasses import dataclass

from sim_instruments.bench_errors import BenchErrors, no_errors
from sim_instruments.population import PartTruth
from sim_instruments.settling import NodeHistory, settle_time

SATURATED_NODE_V = 14.5      # servo integrator output at its clamp (fixture runs on +-15 V)
SLEW_V_PER_S = 2000.0        # rail slew rate, 2 V/ms
RELAY_OPERATE_S = 1e-3       # relay closes or opens in 1 ms
FORCE_SETTLE_START_S = 1e-4  # force source steps in 0.1 ms
LOAD_OHM = 2000.0            # output load relays
LOADED_AOL_FACTOR = 0.5      # 2 kOhm load costs 6 dB of AOL
MIN_SPAN_V, MAX_SPAN_V = 2.7, 12.0
INPUT_MARGIN_V = 0.3         # inputs may go this far beyond a rail before the loop saturates
CC_MODE_NOISE_RTI = 0.5e-3   # rail in constant-current mode: unregulated, readings are garbage
OPEN_LEAKAGE_A = 0.2e-6      # fixture leakage seen instead of Iq when a part is not contacted
DEFAULT_COMPLIANCE_A = 20e-3
BOLTZMANN = 1.380649e-23     # J/K, CODATA 2018 exact value
TEMPERATURE_K = 300.0
DMM_NOISE_PER_RANGE = 3e-8   # DMM own noise: 3e-8 x range at 1 NPLC, falling as 1/sqrt(NPLC)
DEFAULT_TAU_S = 2.5e-3       # node time constant when no part is in the loop
# Bias-current resistors (invented demo fixture): Rb in series with each input, each shunted
# by a normally-closed relay; channel 5xx (+ input) / 6xx (- input) opens the shunt.
BIAS_PLUS_BANK, BIAS_MINUS_BANK = 5, 6   # 4xx shorts a DMM's input (bench self-test)
DEFAULT_RB_OHM = 100e6
FIXTURE_CAPACITANCE_F = 50e-12   # input node to guard: Rb x C is the settling time constant
BIAS_TAIL_SHARE = 0.01           # dielectric absorption: 1 % of a step settles slowly...
BIAS_TAIL_S = 60e-3              # ... with this time constant


def loop_gain(rf_ohm: float, rs_ohm: float) -> float:
    """Servo-loop gain from input offset to the measurement node: G = 1 + Rf/Rs."""
    return 1.0 + rf_ohm / rs_ohm


def _logistic(x: float) -> float:
    if x >= 0:
        return 1.0 / (1.0 + math.exp(-x))
    e = math.exp(x)
    return e / (1.0 + e)


def vos_true(part: PartTruth, vcm: float, span: float, vout: float = 0.0,
             loaded: bool = False) -> float:
    """Input-referred error the loop nulls: offset blend of the two input pairs, plus the
    supply (PSRR) and output (1/AOL) terms."""
    centre = part.crossover_vcm(span)
    scale = part.crossover_width_v / (2.0 * math.log(9.0))  # 10-90 % width -> logistic scale
    weight_high = _logistic((vcm - centre) / scale)
    low_line = part.vos_low_v + part.cmrr_low_vv * vcm
    high_line = part.vos_low_v + part.cm_step_v + part.cmrr_high_vv * (vcm - centre)
    aol = part.aol_vv * (LOADED_AOL_FACTOR if loaded else 1.0)
    return ((1.0 - weight_high) * low_line + weight_high * high_line
            + part.psrr_vv * (span - 10.0) + vout / aol)


def integration_time(nplc: float, line_hz: float) -> float:
    return nplc / line_hz


def dmm_own_noise(dmm_range: float, nplc: float, autozero: bool = True) -> float:
    """RMS noise of the DMM itself, node volts; autozero subtracts a zero reading (x sqrt 2)."""
    sigma = DMM_NOISE_PER_RANGE * dmm_range / math.sqrt(nplc)
    return sigma * (math.sqrt(2.0) if autozero else 1.0)


def resistor_noise_density(rf_ohm: float, rs_ohm: float) -> float:
    """Johnson noise sqrt(4kTR) of Rs || Rf, V/rtHz (1.29 nV/rtHz for 100 Ohm at 300 K)."""
    r_parallel = rf_ohm * rs_ohm / (rf_ohm + rs_ohm)
    return math.sqrt(4.0 * BOLTZMANN * TEMPERATURE_K * r_parallel)


def johnson_density(r_ohm: float, temperature_k: float = TEMPERATURE_K) -> float:
    """Johnson noise sqrt(4kTR) of one resistor, V/rtHz (407 nV/rtHz for 10 MOhm at 300 K)."""
    return math.sqrt(4.0 * BOLTZMANN * temperature_k * r_ohm)


def bias_offset_rti(part: PartTruth, rb_plus_ohm: float, rb_minus_ohm: float) -> float:
    """What the bias currents add to the loop's offset reading with Rb in series with the
    inputs (0 Ohm where the shunt is closed). The reading is V(-in) - V(+in) at the null, and a
    current flowing into a pin through Rb lowers that pin: + input adds Ib+ Rb, - input takes
    Ib- Rb away."""
    return part.ib_plus_a * rb_plus_ohm - part.ib_minus_a * rb_minus_ohm


def part_noise_rti(part: PartTruth, integration_s: float, rf_ohm: float = 100e3,
                   rs_ohm: float = 100.0, rb_in_ohm: float = 0.0) -> float:
    """RMS input-referred noise of one reading integrating `integration_s` seconds: white
    density e (part plus resistors, with `rb_in_ohm` of bias resistors in series with the
    inputs) averaged over T gives e/sqrt(2T); plus the 1/f floor."""
    density_sq = (part.noise_v_rthz ** 2 + resistor_noise_density(rf_ohm, rs_ohm) ** 2
                  + johnson_density(rb_in_ohm) ** 2)
    return math.sqrt(density_sq / (2.0 * integration_s) + part.flicker_v ** 2)


def expected_noise_rti(nplc: float, line_hz: float, part: PartTruth, rf_ohm: float = 100e3,
                       rs_ohm: float = 100.0, dmm_range: float = 1.0,
                       autozero: bool = True, rb_in_ohm: float = 0.0) -> float:
    """RMS input-referred noise of one DMM reading of a settled site (what the station
    can at best reach per reading), with `rb_in_ohm` of bias resistors in series."""
    gain = loop_gain(rf_ohm, rs_ohm)
    t = integration_time(nplc, line_hz)
    node = math.hypot(gain * part_noise_rti(part, t, rf_ohm, rs_ohm, rb_in_ohm),
                      dmm_own_noise(dmm_range, nplc, autozero))
    return node / gain


def thermal_step_v(before: tuple[float, float, float], after: tuple[float, float, float]) -> float:
    """Signed size of a change of (V+, V-, Vout) that drives the thermal tail (invented mix:
    common-mode move, plus 0.3 x span change, plus 0.5 x output change)."""
    (p0, m0, o0), (p1, m1, o1) = before, after
    d_vcm = -((p1 + m1) - (p0 + m0)) / 2.0
    d_span = (p1 - m1) - (p0 - m0)
    return d_vcm + 0.3 * d_span + 0.5 * (o1 - o0)


def bias_settle_time_to(error_rti: float, step_rti: float, part: PartTruth, rb_ohm: float,
                        capacitance_f: float = FIXTURE_CAPACITANCE_F) -> float:
    """Model seconds after a bias relay operates until a change of the offset by `step_rti`
    stays within `error_rti`: Rb x C (or the loop, if slower), and the dielectric tail."""
    tau = max(part.tau_fast_s, rb_ohm * capacitance_f)
    return settle_time(error_rti, step_rti, tau, BIAS_TAIL_SHARE * step_rti, BIAS_TAIL_S)


def settle_time_to(error_rti: float, step_rti: float, part: PartTruth,
                   rail_step_v: float = 0.0) -> float:
    """Model seconds after the rails finish slewing until a change of the target by
    `step_rti` (input-referred), with a thermal step of `rail_step_v` (see thermal_step_v),
    stays within `error_rti` of the settled value."""
    return settle_time(error_rti, step_rti, part.tau_fast_s,
                       part.thermal_v_per_v * rail_step_v, part.tau_slow_s)


SWITCH_OVER_BANK = 7   # relay 70k switches site k (of kind both) to the difference amplifier
DIFF_AMP_R_OHM = 1e3   # invented: the difference amplifier's input resistors (its feedback: G x this)


def diff_amp_slope(errors: tuple[float, float, float, float], gain: float) -> float:
    """Input-referred common-mode slope of a difference amplifier whose resistors R1 (input to
    -), R2 (- to output), R3 (input to +), R4 (+ to ground) are off by fractions `errors`:
    to first order its common-mode gain is G (e1 - e2 - e3 + e4) / (1 + G), i.e. a slope of
    (e1 - e2 - e3 + e4) / (1 + G) against the part's own common mode G Vin / (1 + G)."""
    e1, e2, e3, e4 = errors
    return (e1 - e2 - e3 + e4) / (1.0 + gain)


@dataclass(frozen=True)
class FixtureSpec:
    sites: int = 4
    rf_ohm: float = 100e3
    rs_ohm: float = 100.0
    dmm_per_site: bool = True
    rb_ohm: tuple[float, ...] = (DEFAULT_RB_OHM,) * 4   # bias resistor of each site
    capacitance_f: float = FIXTURE_CAPACITANCE_F
    # Per site: servo_loop, diff_amp, or both (relay 70k switches site k to the amplifier).
    kinds: tuple[str, ...] = ()
    diff_gain: float = 1.0
    diff_slope: tuple[float, ...] = ()   # per site: the resistor mismatch's slope (diff_amp_slope)

    def kind_of(self, site: int) -> str:
        return self.kinds[site - 1] if self.kinds else "servo_loop"

    @property
    def diff_cm_share(self) -> float:
        """The part's common mode per volt at the tied inputs, G / (1 + G)."""
        return self.diff_gain / (1.0 + self.diff_gain)

    def rb_of(self, site: int) -> float:
        return self.rb_ohm[site - 1] if site <= len(self.rb_ohm) else self.rb_ohm[-1]

    def rb_tau(self, site: int) -> float:
        return self.rb_of(site) * self.capacitance_f

    @property
    def gain(self) -> float:
        return loop_gain(self.rf_ohm, self.rs_ohm)


@dataclass
class GeneratorState:
    """The function generator's sine: frequency, RMS amplitude, output relay, and the model
    time of its last change (the AC voltmeter's filter settles from there)."""

    frequency_hz: float = 1e3
    amplitude_vrms: float = 0.0
    output: bool = False
    changed_t: float = 0.0

    @property
    def live_vrms(self) -> float:
        return self.amplitude_vrms if self.output else 0.0


def cm_slope_at(part: PartTruth, vcm: float, span: float, frequency_hz: float) -> complex:
    """The part's common-mode slope at `frequency_hz` (input-referred, V/V, complex): its DC
    slope at `vcm` rising with a single pole at its corner (the rejection falls as
    1 / sqrt(1 + (f/fc)^2) in magnitude)."""
    return part.cm_slope(vcm, span) * complex(1.0, frequency_hz / part.cmrr_corner_hz)


@dataclass
class SupplyChannel:
    """One rail: programmed level, output relay, compliance, and the slewing actual level."""

    programmed_v: float = 0.0
    output: bool = False
    compliance_a: float = DEFAULT_COMPLIANCE_A
    ramp_t: float = 0.0
    ramp_from: float = 0.0
    ramp_to: float = 0.0

    @property
    def final_v(self) -> float:
        return self.programmed_v if self.output else 0.0

    def retarget(self, now: float) -> None:
        self.ramp_from = self.level_at(now)
        self.ramp_t = now
        self.ramp_to = self.final_v

    @property
    def ramp_end(self) -> float:
        return self.ramp_t + abs(self.ramp_to - self.ramp_from) / SLEW_V_PER_S

    def level_at(self, t: float) -> float:
        if t >= self.ramp_end:
            return self.ramp_to
        direction = 1.0 if self.ramp_to > self.ramp_from else -1.0
        return self.ramp_from + direction * SLEW_V_PER_S * max(0.0, t - self.ramp_t)


@dataclass(frozen=True)
class OperatingPoint:
    """Settled state of the shared sources after the latest change."""

    vplus: float
    vminus: float
    sag: float                   # factor applied to both rails (1 when not in current limit)
    in_limit: tuple[bool, bool]  # channel 1, 2 in constant-current mode
    current: tuple[float, float]  # signed: ch1 sources (+), ch2 sinks (-)
    powered: tuple[bool, ...]    # per site
    vout: float


class BenchModel:
    """Shared state of the fixture; callers hold `lock` around each group of calls."""

    def __init__(self, fixture: FixtureSpec, ideal: bool = False,
                 errors: BenchErrors | None = None) -> None:
        self.fixture = fixture
        # The bench's own measurement errors (sim_instruments/bench_errors.py); none by default.
        self.errors = errors or no_errors(fixture.sites)
        # Ideal bench (overhead benchmark): nodes jump to their targets and DMM readings
        # take no time, so what remains of a test time is the station's own overhead.
        self.ideal = ideal
        self.lock = threading.RLock()
        self.channels = (SupplyChannel(), SupplyChannel())
        self.force_level_v = 0.0
        self.force_output = False
        # The function generator, summed onto the tied inputs of the difference amplifier.
        self.generator = GeneratorState()
        self.relays: set[int] = set()
        self.seated: list[PartTruth | None] = [None] * fixture.sites
        self.contact: list[bool] = [False] * fixture.sites
        self.leak_a: list[float] = [0.0] * fixture.sites   # a failing fixture's leakage per site
        self.nodes = [NodeHistory(SATURATED_NODE_V) for _ in range(fixture.sites)]
        self._conditions = [(0.0, 0.0, 0.0)] * fixture.sites
        self._bias_rti = [0.0] * fixture.sites   # bias offset in each site's last target
        self.op = self._operating_point()

    # --- changes -------------------------------------------------------------------------
    def set_supply(self, channel: int, now: float, *, voltage: float | None = None,
                   output: bool | None = None, compliance: float | None = None) -> None:
        ch = self.channels[channel - 1]
        if voltage is not None:
            ch.programmed_v = voltage
        if output is not None:
            ch.output = output
        if compliance is not None:
            ch.compliance_a = compliance
        ch.retarget(now)
        self._changed(now, now)

    def set_force(self, now: float, *, level: float | None = None,
                  output: bool | None = None) -> None:
        if level is not None:
            self.force_level_v = level
        if output is not None:
            self.force_output = output
        self._changed(now, now + FORCE_SETTLE_START_S)

    def set_generator(self, now: float, *, frequency: float | None = None, vrms: float | None = None,
                      output: bool | None = None) -> None:
        gen = self.generator
        if frequency is not None:
            gen.frequency_hz = frequency
        if vrms is not None:
            gen.amplitude_vrms = vrms
        if output is not None:
            gen.output = output
        gen.changed_t = now

    def ac_node_vrms(self, site: int) -> float:
        """RMS of the node's component at the generator's frequency: only a site in the
        difference amplifier sees the sine, through the part's common-mode slope at that
        frequency plus the resistor mismatch's (flat) term, times the amplifier's gain."""
        part = self.seated[site - 1]
        gen = self.generator
        if (part is None or not self.contact[site - 1] or not self.op.powered[site - 1]
                or not self.in_diff_amp(site) or self._saturated(site)):
            return 0.0
        span = self.op.vplus - self.op.vminus
        fixture = self.fixture
        mismatch = fixture.diff_slope[site - 1] if fixture.diff_slope else 0.0
        slope = cm_slope_at(part, self.diff_vcm(site), span, gen.frequency_hz) + mismatch
        return fixture.diff_gain * gen.live_vrms * abs(slope)

    def set_relays(self, closed: set[int], now: float) -> None:
        self.relays = set(closed)
        self._changed(now, now + RELAY_OPERATE_S)

    def seat(self, site: int, part: PartTruth | None, now: float, contact: bool) -> None:
        """Put `part` (or nothing) in `site` (1-based); `contact` False models an open."""
        self.seated[site - 1] = part
        self.contact[site - 1] = contact and part is not None
        if part is not None:
            part.site = site
        self._conditions[site - 1] = (0.0, 0.0, 0.0)  # a freshly seated die starts cold
        self._changed(now, now + RELAY_OPERATE_S)

    # --- readouts ------------------------------------------------------------------------
    def supply_voltage(self, channel: int, now: float) -> float:
        ch = self.channels[channel - 1]
        return ch.level_at(now) * (self.op.sag if ch.output else 1.0)

    def supply_current(self, channel: int) -> float:
        return self.op.current[channel - 1]

    def force_voltage(self) -> float:
        return self.force_level_v if self.force_output else 0.0

    def node_mean(self, site: int, start: float, end: float) -> float:
        return self.nodes[site - 1].mean(start, end)

    def node_noise(self, site: int, integration_s: float) -> float:
        """RMS node noise from the part (and unregulated rails); the DMM adds its own."""
        part = self.seated[site - 1]
        if part is None or self._saturated(site):
            return 0.0
        gain = self.gain_of(site)
        rb_plus, rb_minus = self.rb_in_circuit(site)
        rf, rs = ((self.fixture.diff_gain * DIFF_AMP_R_OHM, DIFF_AMP_R_OHM) if self.in_diff_amp(site)
                  else (self.fixture.rf_ohm, self.fixture.rs_ohm))
        sigma = gain * part_noise_rti(part, integration_s, rf, rs, rb_plus + rb_minus)
        if any(self.op.in_limit):
            sigma = math.hypot(sigma, gain * CC_MODE_NOISE_RTI)
        return sigma

    def in_diff_amp(self, site: int) -> bool:
        """True while `site` measures in the difference amplifier (by its kind, or relay 70k)."""
        kind = self.fixture.kind_of(site)
        return kind == "diff_amp" or (kind == "both" and SWITCH_OVER_BANK * 100 + site in self.relays)

    def gain_of(self, site: int) -> float:
        """From the part's input error to the node the DMM reads: the loop's 1 + Rf/Rs, or the
        difference amplifier's noise gain 1 + G."""
        return 1.0 + self.fixture.diff_gain if self.in_diff_amp(site) else self.fixture.gain

    def diff_vcm(self, site: int) -> float:
        """The part's common mode (against the supply mid-point) in the difference amplifier:
        the rails' own, plus G / (1 + G) of the force source on the tied inputs."""
        op = self.op
        return -(op.vplus + op.vminus) / 2.0 + self.fixture.diff_cm_share * op.vout

    def dmm_shorted(self, dmm_index: int) -> bool:
        """True while relay 40k shorts the input of DMM k."""
        return (400 + dmm_index) in self.relays

    def rb_in_circuit(self, site: int) -> tuple[float, float]:
        """Bias resistance in series with the + and - inputs of `site` (0: shunt closed)."""
        rb = self.fixture.rb_of(site)
        return (rb if BIAS_PLUS_BANK * 100 + site in self.relays else 0.0,
                rb if BIAS_MINUS_BANK * 100 + site in self.relays else 0.0)

    def dmm_site(self, dmm_index: int) -> int | None:
        """Site whose node DMM `dmm_index` (1-based) sees, None for an open input."""
        if self.fixture.dmm_per_site:
            return dmm_index if dmm_index <= self.fixture.sites else None
        closed = [k for k in range(1, self.fixture.sites + 1) if 200 + k in self.relays]
        return closed[0] if len(closed) == 1 else None

    def state(self, now: float) -> dict:
        return {
            "model_time": now,
            "supply": {
                f"ch{i}": {
                    "programmed_v": ch.programmed_v,
                    "actual_v": self.supply_voltage(i, now),
                    "output": ch.output,
                    "compliance_a": ch.compliance_a,
                    "current_a": self.supply_current(i),
                    "in_limit": self.op.in_limit[i - 1],
                } for i, ch in enumerate(self.channels, start=1)
            },
            "force": {"level_v": self.force_level_v, "output": self.force_output},
            "relays_closed": sorted(self.relays),
            "sites": {
                k: {"part": p.part_id if p else None, "contact": self.contact[k - 1],
                    "powered": self.op.powered[k - 1], "node_target_v": self.nodes[k - 1].target}
                for k, p in enumerate(self.seated, start=1)
            },
        }

    # --- internals -----------------------------------------------------------------------
    def _operating_point(self) -> OperatingPoint:
        ch1, ch2 = self.channels
        vplus, vminus = ch1.final_v, ch2.final_v
        both_on = ch1.output and ch2.output
        powered = tuple(both_on and (100 + k) in self.relays
                        for k in range(1, self.fixture.sites + 1))
        span = vplus - vminus
        vout = self.force_voltage()
        demand = [0.0, 0.0]
        for k, part in enumerate(self.seated, start=1):
            if not powered[k - 1]:
                continue
            if part is None or not self.contact[k - 1]:
                draw = OPEN_LEAKAGE_A + self.leak_a[k - 1]
            elif math.isfinite(part.short_ohm):
                draw = abs(span) / part.short_ohm
            else:
                draw = part.iq(span) + self.leak_a[k - 1]
            demand[0] += draw
            demand[1] += draw
            if (300 + k) in self.relays and part is not None and self.contact[k - 1]:
                load = vout / LOAD_OHM
                demand[0 if load > 0 else 1] += abs(load)
        ratios = [ch.compliance_a / d if d > 0 else math.inf for ch, d in zip(self.channels, demand, strict=True)]
        sag = min(1.0, *ratios)
        in_limit = (ratios[0] < 1.0 and ratios[0] == sag, ratios[1] < 1.0 and ratios[1] == sag)
        current = (demand[0] * sag, -demand[1] * sag)
        return OperatingPoint(vplus * sag, vminus * sag, sag, in_limit, current, powered, vout)

    def _saturated(self, site: int) -> bool:
        return abs(self._target(site)) >= SATURATED_NODE_V

    def _target(self, site: int) -> float:
        op = self.op
        part = self.seated[site - 1]
        if (not op.powered[site - 1] or part is None or not self.contact[site - 1]
                or math.isfinite(part.short_ohm)):
            return SATURATED_NODE_V
        span = op.vplus - op.vminus
        vcm = -(op.vplus + op.vminus) / 2.0
        if not MIN_SPAN_V <= span <= MAX_SPAN_V or abs(vcm) > span / 2.0 + INPUT_MARGIN_V:
            return SATURATED_NODE_V
        if self.in_diff_amp(site):
            return self._diff_target(site, part, span)
        loaded = (300 + site) in self.relays
        bench_error = (self.errors.site_offset_v[site - 1]
                       + self.errors.leakage_slope(site, self.fixture.rf_ohm, self.fixture.rs_ohm) * vcm)
        error = (vos_true(part, vcm, span, op.vout, loaded) + bias_offset_rti(part, *self.rb_in_circuit(site))
                 + bench_error)
        node = self.fixture.gain * error
        return max(-SATURATED_NODE_V, min(SATURATED_NODE_V, node))

    def _diff_target(self, site: int, part: PartTruth, span: float) -> float:
        """The difference amplifier's output: the part's error times the noise gain 1 + G, plus
        the resistor mismatch's common-mode term. The output sits near 0 V, so the part's
        1/AOL term (microvolts over AOL) is left out."""
        op = self.op
        vcm = self.diff_vcm(site)
        if abs(vcm) > span / 2.0 + INPUT_MARGIN_V:
            return SATURATED_NODE_V
        fixture = self.fixture
        slope = fixture.diff_slope[site - 1] if fixture.diff_slope else 0.0
        error = (vos_true(part, vcm, span) + bias_offset_rti(part, *self.rb_in_circuit(site))
                 + self.errors.site_offset_v[site - 1])
        node = (1.0 + fixture.diff_gain) * error + fixture.diff_gain * slope * op.vout
        return max(-SATURATED_NODE_V, min(SATURATED_NODE_V, node))

    def _changed(self, now: float, settle_from: float) -> None:
        """Recompute the operating point and start each site's transient toward its target."""
        self.op = self._operating_point()
        t_start = max(settle_from, *(ch.ramp_end for ch in self.channels))
        for k in range(1, self.fixture.sites + 1):
            powered = self.op.powered[k - 1]
            conditions = ((self.op.vplus, self.op.vminus, self.op.vout) if powered
                          else (0.0, 0.0, 0.0))
            if powered and self.in_diff_amp(k):
                # The tied inputs move the part's common mode as the rails would in the other
                # direction; its output stays put.
                shift = self.fixture.diff_cm_share * self.op.vout
                conditions = (self.op.vplus - shift, self.op.vminus - shift, 0.0)
            part = self.seated[k - 1]
            tau = part.tau_fast_s if part else DEFAULT_TAU_S
            extra: tuple[tuple[float, float], ...] = ()
            bias = 0.0
            if part is not None and self.contact[k - 1]:
                amp = self.gain_of(k) * part.thermal_v_per_v * thermal_step_v(
                    self._conditions[k - 1], conditions)
                extra = ((amp, part.tau_slow_s), (-amp, part.tau_fast_s))
                bias = bias_offset_rti(part, *self.rb_in_circuit(k)) if powered else 0.0
            self._conditions[k - 1] = conditions
            target = self._target(k)
            bias_step = self.gain_of(k) * (self._bias_rti[k - 1] - bias)  # old - new, node volts
            self._bias_rti[k - 1] = bias
            if self.ideal:
                self.nodes[k - 1].jump(now, target)
                continue
            if bias_step and abs(target) < SATURATED_NODE_V:
                # A bias resistor switched in or out: the inputs charge through Rb x C, and a
                # small share of the step creeps in with the fixture's dielectric absorption.
                tau = max(tau, self.fixture.rb_tau(k))
                extra += ((-BIAS_TAIL_SHARE * bias_step, tau), (BIAS_TAIL_SHARE * bias_step, BIAS_TAIL_S))
            self.nodes[k - 1].change(now, target, t_start, extra, tau)

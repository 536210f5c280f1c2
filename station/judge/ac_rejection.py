"""Common-mode rejection versus frequency: CMRR(f) from AC amplitudes, a single pole's roll-off,
and the frequency where the rejection has fallen 3 dB.

In the difference amplifier of gain G with both inputs on a sine of Vin (RMS), the part sees
the common mode G Vin / (1 + G) and its input error reaches the output with the noise gain
1 + G, so CMRR(f) = (G Vin / (1 + G)) / (Vout / (1 + G)) = G Vin / Vout (in dB, 20 log10 of it).

The -3 dB frequency: the reference is the rejection at the lowest frequency point (taken as
the DC value; it is one when that point sits well below the corner). Going up, the first pair
of neighbouring points that straddles reference - 3 dB is interpolated linearly in dB against
log10 f; nan when no point falls 3 dB below the reference (the corner lies above the sweep).
"""

from __future__ import annotations

import math
from collections.abc import Sequence
from itertools import pairwise

DROP_DB = 3.0


def single_pole_db(frequency_hz: float, corner_hz: float) -> float:
    """A single pole's change of rejection at `frequency_hz`: 20 log10(1 / sqrt(1 + (f/fc)^2))."""
    return -10.0 * math.log10(1.0 + (frequency_hz / corner_hz) ** 2)


def cmrr_ac_db(vin_vrms: float, vout_vrms: float, gain: float) -> float:
    """20 log10(G Vin / Vout); nan for an over-range (inf) or zero reading."""
    if not math.isfinite(vout_vrms) or vout_vrms <= 0.0:
        return math.nan
    return 20.0 * math.log10(gain * vin_vrms / vout_vrms)


def minus_3db_frequency(frequencies_hz: Sequence[float], cmrr_db: Sequence[float]) -> float:
    """Where CMRR has fallen DROP_DB below its value at the lowest frequency (see the module)."""
    points = sorted(zip(frequencies_hz, cmrr_db, strict=True))
    if len(points) < 2 or any(math.isnan(db) for _, db in points):
        return math.nan
    target = points[0][1] - DROP_DB
    for (f0, d0), (f1, d1) in pairwise(points):
        if d1 <= target:     # every earlier point still above the target, so d0 > target
            share = (d0 - target) / (d0 - d1)
            return 10.0 ** (math.log10(f0) + share * (math.log10(f1) - math.log10(f0)))
    return math.nan


def label_frequency(label: str) -> float:
    """The frequency (Hz) of a region name written by frequency_label ('1 kHz' -> 1000.0)."""
    number, unit = str(label).split()
    return float(number) * (1e3 if unit == "kHz" else 1.0)


def frequency_label(frequency_hz: float) -> str:
    """The region name of a frequency point in the datalog and the limit table: '20 Hz', '1 kHz'."""
    if frequency_hz >= 1e3:
        return f"{frequency_hz / 1e3:g} kHz"
    return f"{frequency_hz:g} Hz"

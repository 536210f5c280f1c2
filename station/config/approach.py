"""The known shape of a settling approach, as a fixture characterisation gives it."""

from __future__ import annotations

from dataclasses import dataclass


@dataclass(frozen=True)
class Approach:
    """The known shape of a settling approach (fixture characterisation), for settling that
    predicts the wait from an early sample instead of detecting it (the bias-current step's
    `predict:`): after `delay_s` (relay operate), an error step decays as
    (1 - tail_share) exp(-t / tau_s) + tail_share exp(-t / tail_s); the wait ends when the
    step bound times that envelope is below `sigmas` times the reading's noise, at most `max_s`."""

    tau_s: float
    tail_s: float
    tail_share: float
    delay_s: float
    max_s: float
    sigmas: float = 1.0

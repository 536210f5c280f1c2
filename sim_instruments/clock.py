"""Model time: wall time since the bench started, multiplied by the speed factor.

At speed 20 a 20 ms integration sleeps 1 ms of wall time, while the physics (settling,
slew) is evaluated in model seconds, so a fast test sees the same physics as a slow one.
"""

from __future__ import annotations

import time


class ModelClock:
    def __init__(self, speed: float = 1.0) -> None:
        if speed <= 0:
            raise ValueError("speed must be > 0")
        self.speed = speed
        self._wall0 = time.monotonic()

    def now(self) -> float:
        """Model seconds since the bench started."""
        return (time.monotonic() - self._wall0) * self.speed

    def sleep(self, model_seconds: float) -> None:
        if model_seconds > 0:
            time.sleep(model_seconds / self.speed)

    def sleep_until(self, model_time: float) -> None:
        self.sleep(model_time - self.now())

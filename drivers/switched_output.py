"""What every source with one switched output shares: OUTP on and off, its read-back, the
check that an output told off is off, and the configure step that leaves it safe."""

from __future__ import annotations

from drivers.errors import InstrumentError
from drivers.scpi_link import ScpiLink


class SwitchedOutput:
    """A driver with one output behind `OUTP`; the class says how it is made safe (`zero_and_off`)."""

    link: ScpiLink

    @property
    def role(self) -> str:
        return self.link.role

    def output(self, on: bool) -> None:
        self.link.write_and_wait(f"OUTP {'ON' if on else 'OFF'}")

    def output_state(self) -> bool:
        return self.link.query_bool("OUTP?")

    def configure(self) -> None:
        """Safe (zero_and_off), error queue checked."""
        self.zero_and_off()
        self.link.check_errors()

    def zero_and_off(self) -> None:
        raise NotImplementedError

    def _confirm_off(self) -> None:
        # The query proves the writes before it arrived.
        if self.output_state():
            raise InstrumentError(self.role, self.link.resource, "OUTP?",
                                  "still reports the output on after OUTP OFF")

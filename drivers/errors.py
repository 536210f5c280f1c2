"""Every exception an instrument or a driver can raise, in one place.

`InstrumentError` and its subclasses mean the bench misbehaved (the sequencer logs them as a
tester fault, never as a DUT failure). `RequestRefused` means a driver would not send a value
at all, because it is out of the instrument's range or beyond the bench's safety limits.
"""

from __future__ import annotations

from collections.abc import Callable, Iterable, Sequence


class InstrumentError(Exception):
    """An instrument did not do what was asked; says which role, resource and command."""

    def __init__(self, role: str, resource: str, command: str | None, detail: str) -> None:
        self.role = role
        self.resource = resource
        self.command = command
        self.detail = detail
        super().__init__(self.one_line())

    def one_line(self) -> str:
        where = f"{self.role} ({self.resource})"
        if self.command:
            return f"{where}: {self.command!r} {self.detail}"
        return f"{where}: {self.detail}"

    def __str__(self) -> str:
        return self.one_line()


class InstrumentTimeout(InstrumentError):
    """No (complete) reply within the timeout."""


class InstrumentConnectionLost(InstrumentError):
    """The connection was closed or reset; `ScpiLink.reconnect()` may recover it."""


class InstrumentNotSent(InstrumentConnectionLost):
    """The link was found closed before the message went out: the instrument never saw it."""


class InstrumentBadReply(InstrumentError):
    """A reply came back, but it is garbled or not what the command returns."""


class InstrumentOpenError(InstrumentError):
    """The instrument could not be opened or is not the one the bench config expects."""


class InstrumentReportedError(InstrumentError):
    """The instrument's SCPI error queue was not empty."""

    def __init__(self, role: str, resource: str, command: str | None,
                 errors: Sequence[tuple[int, str]]) -> None:
        self.errors = list(errors)
        listed = "; ".join(f'{code},"{message}"' for code, message in self.errors)
        detail = f"left {len(self.errors)} error(s) in the queue: {listed}"
        super().__init__(role, resource, command, detail)

    @property
    def codes(self) -> list[int]:
        return [code for code, _ in self.errors]


class RequestRefused(Exception):
    """A driver refused a value before sending it (instrument range or bench safety limit)."""

    def __init__(self, role: str, what: str, value: object, allowed: str, reason: str = "") -> None:
        self.role = role
        self.what = what
        self.value = value
        self.allowed = allowed
        self.reason = reason
        text = f"{role}: refused {what} = {value}: allowed {allowed}"
        if reason:
            text += f" ({reason})"
        super().__init__(text)


def attempt_each(actions: Iterable[Callable[[], object]], failures: list[InstrumentError] | None = None) -> None:
    """Run every action even if an earlier one fails; then raise the first failure, if any.

    The way to a safe state: a lost reply on one command must not leave an output on.
    `failures` may carry failures from earlier steps of the same sequence.
    """
    failures = list(failures or [])
    for action in actions:
        try:
            action()
        except InstrumentError as exc:
            failures.append(exc)
    if failures:
        raise failures[0]

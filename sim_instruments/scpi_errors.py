"""SCPI error codes the simulated instruments queue, with their standard texts (SCPI-1999 ch. 21)."""

from __future__ import annotations

ERROR_TEXTS: dict[int, str] = {
    0: "No error",
    -100: "Command error",
    -102: "Syntax error",
    -104: "Data type error",
    -108: "Parameter not allowed",
    -109: "Missing parameter",
    -113: "Undefined header",
    -131: "Invalid suffix",
    -200: "Execution error",
    -221: "Settings conflict",
    -222: "Data out of range",
    -224: "Illegal parameter value",
    -230: "Data corrupt or stale",
    -300: "Device-specific error",
    -350: "Queue overflow",
    -363: "Input buffer overrun",
    -400: "Query error",
}


def error_text(code: int) -> str:
    """Standard text of `code`; codes we do not know get the text of their class."""
    if code in ERROR_TEXTS:
        return ERROR_TEXTS[code]
    if code > 0:
        return "Device-dependent error"
    return ERROR_TEXTS.get((code // 100) * 100 if code > -100 else -((-code // 100) * 100),
                           "Device-specific error")


class ScpiError(Exception):
    """Raised by a command handler; the instrument queues `code` and drops the command's reply."""

    def __init__(self, code: int, detail: str = "") -> None:
        self.code = code
        self.detail = detail
        super().__init__(f"{code},{error_text(code)}" + (f"; {detail}" if detail else ""))

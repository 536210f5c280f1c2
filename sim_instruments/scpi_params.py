"""SCPI program data: split a parameter string into typed tokens, then convert them per command.

Tokens follow SCPI-1999 vol. 1 ch. 7: decimal numeric data with an optional suffix (unit with
multiplier, e.g. "100 mV", "5V", "20MA" = 20 mA), character data (ON, MIN, CH1), quoted
strings and channel lists "(@101,102:104)". Converters raise ScpiError with the standard code:
-104 wrong kind of data, -222 out of range, -131 bad suffix, -102 malformed.
"""

from __future__ import annotations

import math
import re
from collections.abc import Callable, Sequence
from dataclasses import dataclass

from sim_instruments.scpi_errors import ScpiError

_NUMERIC = re.compile(r"^([+-]?(?:\d+\.?\d*|\.\d+)(?:[eE][+-]?\d+)?)\s*([A-Za-z]*)$")
_CHARACTER = re.compile(r"^[A-Za-z][A-Za-z0-9_]*$")
_CHANNEL_LIST = re.compile(r"^\(\s*@\s*([0-9,:\s]+)\)$")

# SCPI suffix multipliers (SCPI-1999 vol. 1 7.7.3). "M" is milli; mega is "MA".
_MULTIPLIERS: dict[str, float] = {
    "": 1.0, "EX": 1e18, "PE": 1e15, "T": 1e12, "G": 1e9, "MA": 1e6, "K": 1e3,
    "M": 1e-3, "U": 1e-6, "N": 1e-9, "P": 1e-12, "F": 1e-15,
}


@dataclass(frozen=True)
class Numeric:
    value: float
    suffix: str  # upper case, "" when none


@dataclass(frozen=True)
class Character:
    text: str  # upper case


@dataclass(frozen=True)
class QuotedString:
    text: str


@dataclass(frozen=True)
class ChannelList:
    channels: tuple[int, ...]


Token = Numeric | Character | QuotedString | ChannelList
Converter = Callable[[Token], object]


def split_top_level(text: str, separator: str) -> list[str]:
    """Split on `separator` outside quotes and parentheses."""
    parts: list[str] = []
    depth = 0
    quote: str | None = None
    current: list[str] = []
    for char in text:
        if quote:
            if char == quote:
                quote = None
        elif char in "\"'":
            quote = char
        elif char == "(":
            depth += 1
        elif char == ")":
            depth -= 1
        elif char == separator and depth == 0:
            parts.append("".join(current))
            current = []
            continue
        current.append(char)
    if quote or depth != 0:
        raise ScpiError(-102, "unbalanced quotes or parentheses")
    parts.append("".join(current))
    return parts


def tokenize(data: str) -> list[Token]:
    """Program data (everything after the header) as a list of tokens; '' gives []."""
    if not data.strip():
        return []
    return [_token(piece.strip()) for piece in split_top_level(data, ",")]


def _token(text: str) -> Token:
    if not text:
        raise ScpiError(-102, "empty parameter")
    match = _NUMERIC.match(text)
    if match:
        return Numeric(float(match.group(1)), match.group(2).upper())
    if _CHARACTER.match(text):
        return Character(text.upper())
    if len(text) >= 2 and text[0] in "\"'" and text[-1] == text[0]:
        return QuotedString(text[1:-1])
    match = _CHANNEL_LIST.match(text)
    if match:
        return ChannelList(_channels(match.group(1)))
    raise ScpiError(-102, f"cannot read parameter {text!r}")


def _channels(body: str) -> tuple[int, ...]:
    channels: list[int] = []
    for item in body.split(","):
        item = item.strip()
        if re.fullmatch(r"\d+", item):
            channels.append(int(item))
        elif re.fullmatch(r"\d+\s*:\s*\d+", item):
            first, last = (int(v) for v in item.split(":"))
            step = 1 if last >= first else -1
            channels.extend(range(first, last + step, step))
        else:
            raise ScpiError(-102, f"bad channel list entry {item!r}")
    return tuple(channels)


def _scale_for_suffix(suffix: str, unit: str) -> float:
    if suffix == "":
        return 1.0
    unit = unit.upper()
    if not unit or not suffix.endswith(unit):
        raise ScpiError(-131, f"suffix {suffix!r} does not fit unit {unit!r}")
    prefix = suffix[: len(suffix) - len(unit)]
    if unit == "A" and suffix == "MA":  # SCPI special case: MA is milliampere
        return 1e-3
    if unit in ("HZ", "OHM") and prefix == "M":  # MHZ and MOHM mean mega
        return 1e6
    if prefix not in _MULTIPLIERS:
        raise ScpiError(-131, f"unknown multiplier in {suffix!r}")
    return _MULTIPLIERS[prefix]


def number(unit: str = "", low: float = -math.inf, high: float = math.inf,
           specials: dict[str, float] | None = None) -> Converter:
    """Converter for a decimal value in `unit` within [low, high]; `specials` maps MIN/MAX/DEF."""
    named = {"MIN": low, "MINIMUM": low, "MAX": high, "MAXIMUM": high}
    named.update({k.upper(): v for k, v in (specials or {}).items()})
    if "DEF" in named:
        named.setdefault("DEFAULT", named["DEF"])

    def convert(token: Token) -> float:
        if isinstance(token, Character):
            if token.text in named and math.isfinite(named[token.text]):
                return named[token.text]
            raise ScpiError(-104, f"{token.text} is not a number here")
        if not isinstance(token, Numeric):
            raise ScpiError(-104, "expected a number")
        value = token.value * _scale_for_suffix(token.suffix, unit)
        # A tolerance of 1 ppb keeps "100 uA" from failing a 100e-6 lower bound by rounding.
        span = max(abs(low) if math.isfinite(low) else 0.0, abs(high) if math.isfinite(high) else 0.0)
        slack = 1e-9 * span
        if not (low - slack <= value <= high + slack):
            raise ScpiError(-222, f"{value!r} outside {low!r}..{high!r}")
        return min(max(value, low), high)

    return convert


def integer(low: int, high: int, specials: dict[str, int] | None = None) -> Converter:
    """Converter for an integer in [low, high] (decimal input is rounded, as SCPI allows)."""
    inner = number("", low, high, {k: float(v) for k, v in (specials or {}).items()})

    def convert(token: Token) -> int:
        return int(round(float(inner(token))))  # type: ignore[arg-type]

    return convert


def boolean(token: Token) -> bool:
    """ON/OFF or a number (0 is off, anything else on, after rounding)."""
    if isinstance(token, Character) and token.text in ("ON", "OFF"):
        return token.text == "ON"
    if isinstance(token, Numeric) and token.suffix == "":
        return round(token.value) != 0
    raise ScpiError(-104, "expected ON, OFF, 1 or 0")


def choice(*options: str) -> Converter:
    """Converter for character data among `options` written as SCPI keywords ("ONCE", "CH1")."""
    forms: dict[str, str] = {}
    for option in options:
        short = "".join(c for c in option if c.isupper() or c.isdigit())
        forms[short.upper()] = option.upper()
        forms[option.upper()] = option.upper()

    def convert(token: Token) -> str:
        if isinstance(token, Character) and token.text in forms:
            return forms[token.text]
        if isinstance(token, Character):
            raise ScpiError(-224, f"{token.text} is not one of {', '.join(options)}")
        raise ScpiError(-104, f"expected one of {', '.join(options)}")

    return convert


def channel_list(token: Token) -> tuple[int, ...]:
    if not isinstance(token, ChannelList):
        raise ScpiError(-104, "expected a channel list such as (@101,102)")
    return token.channels


def first_of(*converters: Converter) -> Converter:
    """Try converters in order; the error of the last one is raised if none accepts the token."""

    def convert(token: Token) -> object:
        error: ScpiError | None = None
        for converter in converters:
            try:
                return converter(token)
            except ScpiError as exc:
                error = exc
        assert error is not None
        raise error

    return convert


@dataclass(frozen=True)
class Arguments:
    """The parameters a command takes: `required` converters, then `optional` ones."""

    required: Sequence[Converter] = ()
    optional: Sequence[Converter] = ()

    def convert(self, tokens: list[Token]) -> list[object]:
        if len(tokens) < len(self.required):
            raise ScpiError(-109)
        if len(tokens) > len(self.required) + len(self.optional):
            raise ScpiError(-108)
        converters = list(self.required) + list(self.optional)
        return [conv(tok) for conv, tok in zip(converters, tokens, strict=False)]


NO_ARGUMENTS = Arguments()

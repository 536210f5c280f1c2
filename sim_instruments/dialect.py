"""How a simulated instrument writes its replies: the forms real instruments use for the
same meaning, so the drivers can be shown to read every one of them.

Four independent choices, set with SIMulation:DIALect:<choice> or SimSettings.dialect:

- NUMBer: SCIEntific ``+1.23450000E-03`` (the default), UNSIgned ``1.23450000E-03``,
  PLAIn ``0.00123450000`` (no exponent), UNITs ``+1.23450000E-03 V`` (a unit after the number)
- OVERload: LONG ``+9.90000000E+37`` (the default) or SHORt ``9.9E37``
- BOOLean: NUMBer ``1``/``0`` (the default) or WORD ``ON``/``OFF``
- ERRor: PLAIn ``0,"No error"`` (the default) or SIGNed ``+0,"No error"``
"""

from __future__ import annotations

from dataclasses import dataclass, fields

NUMBER_FORMS = ("SCIENTIFIC", "UNSIGNED", "PLAIN", "UNITS")
OVERLOAD_FORMS = ("LONG", "SHORT")
BOOLEAN_FORMS = ("NUMBER", "WORD")
ERROR_FORMS = ("PLAIN", "SIGNED")


@dataclass
class Dialect:
    number_form: str = "SCIENTIFIC"
    overload_form: str = "LONG"
    boolean_form: str = "NUMBER"
    error_form: str = "PLAIN"

    @classmethod
    def parse(cls, text: str) -> Dialect:
        """'number=plain,bool=word' -> Dialect; ValueError says what is allowed."""
        dialect = cls()
        keys = {"number": ("number_form", NUMBER_FORMS), "overload": ("overload_form", OVERLOAD_FORMS),
                "bool": ("boolean_form", BOOLEAN_FORMS), "error": ("error_form", ERROR_FORMS)}
        for item in filter(None, (part.strip() for part in text.split(","))):
            key, _, value = item.partition("=")
            if key.strip().lower() not in keys:
                raise ValueError(f"unknown dialect choice {key!r}: use {', '.join(keys)}")
            attribute, forms = keys[key.strip().lower()]
            if value.strip().upper() not in forms:
                raise ValueError(f"{key}={value!r}: use one of {', '.join(f.lower() for f in forms)}")
            setattr(dialect, attribute, value.strip().upper())
        return dialect

    def take(self, other: Dialect) -> None:
        """Answer in `other`'s forms from now on (in place: the command tree holds this object)."""
        for item in fields(self):
            setattr(self, item.name, getattr(other, item.name))

    def number(self, value: float, unit: str = "") -> str:
        if self.number_form == "UNSIGNED":
            return f"{value:.8E}"
        if self.number_form == "PLAIN":
            text = f"{value:.15f}".rstrip("0")
            return text + "0" if text.endswith(".") else text
        if self.number_form == "UNITS" and unit:
            return f"{value:+.8E} {unit}"
        return f"{value:+.8E}"

    def overload(self, unit: str = "") -> str:
        text = "9.9E37" if self.overload_form == "SHORT" else "+9.90000000E+37"
        return f"{text} {unit}" if self.number_form == "UNITS" and unit else text

    def flag(self, on: bool) -> str:
        if self.boolean_form == "WORD":
            return "ON" if on else "OFF"
        return "1" if on else "0"

    def error_entry(self, code: int, text: str) -> str:
        number = f"{code:+d}" if self.error_form == "SIGNED" else str(code)
        return f'{number},"{text}"'

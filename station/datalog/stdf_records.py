"""STDF V4 encoder: field types, the record header, and the records the station writes.

Byte order is little-endian throughout (FAR.CPU_TYPE = 2). Each record is a dataclass whose
attributes carry the standard's field names, in the standard's order (see docs/stdf.md); the
STDF type of each field sits in the dataclass field metadata, so the order and the types are
written down once. A field left at None is omitted when it is at the end of the record
(trailing optional fields may be dropped) and written as its type's "missing" value otherwise.
"""

from __future__ import annotations

import dataclasses
import struct
import unicodedata
from dataclasses import dataclass
from typing import Any, ClassVar

CPU_TYPE_LITTLE_ENDIAN = 2
STDF_VERSION = 4
HEAD_ALL = 255  # HEAD_NUM of summary records that cover the whole lot

_FIXED: dict[str, str] = {
    "U1": "<B", "U2": "<H", "U4": "<I",
    "I1": "<b", "I2": "<h", "I4": "<i",
    "R4": "<f", "R8": "<d", "B1": "<B",
}
FIELD_TYPES = frozenset(_FIXED) | {"C1", "Cn", "Bn"}

# Characters our texts may contain that have a plain ASCII spelling.
_ASCII_SPELLING = {"µ": "u", "μ": "u", "Ω": "Ohm", "°": "deg", "±": "+-", "–": "-", "—": "-"}


def to_ascii(text: str) -> str:
    """Spell `text` in ASCII: STDF text fields are ASCII, and readers decode them as such."""
    spelled = "".join(_ASCII_SPELLING.get(ch, ch) for ch in text)
    # NFKD splits accented letters into letter + accent, so "é" keeps its "e".
    decomposed = unicodedata.normalize("NFKD", spelled)
    return "".join(ch if ord(ch) < 128 else ("" if unicodedata.combining(ch) else "?")
                   for ch in decomposed)


def encode_field(type_code: str, value: Any) -> bytes:
    """One field's bytes. Cn is cut to 255 bytes; out-of-range numbers raise ValueError."""
    if type_code in _FIXED:
        try:
            return struct.pack(_FIXED[type_code], value)
        except (struct.error, OverflowError) as exc:
            raise ValueError(f"{value!r} does not fit STDF type {type_code}: {exc}") from None
    if type_code == "C1":
        char = to_ascii(str(value))[:1] or " "
        return char.encode("ascii")
    if type_code == "Cn":
        data = to_ascii(str(value)).encode("ascii")[:255]
        return bytes([len(data)]) + data
    if type_code == "Bn":
        data = bytes(value)
        if len(data) > 255:
            raise ValueError(f"Bn field of {len(data)} bytes: at most 255")
        return bytes([len(data)]) + data
    raise ValueError(f"unknown STDF field type {type_code!r}")


def encode_record(rec_typ: int, rec_sub: int, fields: list[tuple[str, Any]]) -> bytes:
    """A whole record: REC_LEN (U2, body length), REC_TYP, REC_SUB, then the fields."""
    body = b"".join(encode_field(code, value) for code, value in fields)
    if len(body) > 0xFFFF:
        raise ValueError(f"record {rec_typ},{rec_sub} body is {len(body)} bytes: at most 65535")
    return struct.pack("<HBB", len(body), rec_typ, rec_sub) + body


_MISSING: dict[str, Any] = {"C1": " ", "Cn": "", "Bn": b""}


def _f(type_code: str, default: Any = None) -> Any:
    """A record field of STDF type `type_code`."""
    assert type_code in FIELD_TYPES, type_code
    return dataclasses.field(default=default, metadata={"stdf": type_code})


class Record:
    """Base of the record dataclasses: `encode()` gives the record's bytes."""

    REC_TYP: ClassVar[int]
    REC_SUB: ClassVar[int]

    def encode(self) -> bytes:
        layout = [(f.name, f.metadata["stdf"]) for f in dataclasses.fields(self)]  # type: ignore[arg-type]
        values = [getattr(self, name) for name, _ in layout]
        last = max((i for i, v in enumerate(values) if v is not None), default=-1)
        fields = [(code, _MISSING.get(code, 0) if value is None else value)
                  for (_, code), value in zip(layout[:last + 1], values[:last + 1], strict=True)]
        return encode_record(self.REC_TYP, self.REC_SUB, fields)


@dataclass
class Far(Record):
    REC_TYP: ClassVar[int] = 0
    REC_SUB: ClassVar[int] = 10
    CPU_TYPE: int = _f("U1", CPU_TYPE_LITTLE_ENDIAN)
    STDF_VER: int = _f("U1", STDF_VERSION)


@dataclass
class Mir(Record):
    REC_TYP: ClassVar[int] = 1
    REC_SUB: ClassVar[int] = 10
    SETUP_T: int = _f("U4", 0)
    START_T: int = _f("U4", 0)
    STAT_NUM: int = _f("U1", 1)
    MODE_COD: str = _f("C1", " ")
    RTST_COD: str = _f("C1", " ")
    PROT_COD: str = _f("C1", " ")
    BURN_TIM: int = _f("U2", 65535)  # 65535 = missing
    CMOD_COD: str = _f("C1", " ")
    LOT_ID: str = _f("Cn", "")
    PART_TYP: str = _f("Cn", "")
    NODE_NAM: str = _f("Cn", "")
    TSTR_TYP: str = _f("Cn", "")
    JOB_NAM: str = _f("Cn", "")
    JOB_REV: str | None = _f("Cn")
    SBLOT_ID: str | None = _f("Cn")
    OPER_NAM: str | None = _f("Cn")
    EXEC_TYP: str | None = _f("Cn")
    EXEC_VER: str | None = _f("Cn")
    TEST_COD: str | None = _f("Cn")
    TST_TEMP: str | None = _f("Cn")
    USER_TXT: str | None = _f("Cn")
    AUX_FILE: str | None = _f("Cn")
    PKG_TYP: str | None = _f("Cn")
    FAMLY_ID: str | None = _f("Cn")
    DATE_COD: str | None = _f("Cn")
    FACIL_ID: str | None = _f("Cn")
    FLOOR_ID: str | None = _f("Cn")
    PROC_ID: str | None = _f("Cn")
    OPER_FRQ: str | None = _f("Cn")
    SPEC_NAM: str | None = _f("Cn")
    SPEC_VER: str | None = _f("Cn")
    FLOW_ID: str | None = _f("Cn")
    SETUP_ID: str | None = _f("Cn")
    DSGN_REV: str | None = _f("Cn")
    ENG_ID: str | None = _f("Cn")
    ROM_COD: str | None = _f("Cn")
    SERL_NUM: str | None = _f("Cn")
    SUPR_NAM: str | None = _f("Cn")


@dataclass
class Dtr(Record):
    """Datalog text: free text after the MIR (we use it for full hashes and *IDN? strings)."""

    REC_TYP: ClassVar[int] = 50
    REC_SUB: ClassVar[int] = 30
    TEXT_DAT: str = _f("Cn", "")


@dataclass
class Pir(Record):
    REC_TYP: ClassVar[int] = 5
    REC_SUB: ClassVar[int] = 10
    HEAD_NUM: int = _f("U1", 1)
    SITE_NUM: int = _f("U1", 1)


@dataclass
class Ptr(Record):
    REC_TYP: ClassVar[int] = 15
    REC_SUB: ClassVar[int] = 10
    TEST_NUM: int = _f("U4", 0)
    HEAD_NUM: int = _f("U1", 1)
    SITE_NUM: int = _f("U1", 1)
    TEST_FLG: int = _f("B1", 0)
    PARM_FLG: int = _f("B1", 0)
    RESULT: float = _f("R4", 0.0)
    TEST_TXT: str | None = _f("Cn")
    ALARM_ID: str | None = _f("Cn")
    OPT_FLAG: int | None = _f("B1")
    RES_SCAL: int | None = _f("I1")
    LLM_SCAL: int | None = _f("I1")
    HLM_SCAL: int | None = _f("I1")
    LO_LIMIT: float | None = _f("R4")
    HI_LIMIT: float | None = _f("R4")
    UNITS: str | None = _f("Cn")
    C_RESFMT: str | None = _f("Cn")
    C_LLMFMT: str | None = _f("Cn")
    C_HLMFMT: str | None = _f("Cn")
    LO_SPEC: float | None = _f("R4")
    HI_SPEC: float | None = _f("R4")


@dataclass
class Prr(Record):
    REC_TYP: ClassVar[int] = 5
    REC_SUB: ClassVar[int] = 20
    HEAD_NUM: int = _f("U1", 1)
    SITE_NUM: int = _f("U1", 1)
    PART_FLG: int = _f("B1", 0)
    NUM_TEST: int = _f("U2", 0)
    HARD_BIN: int = _f("U2", 0)
    SOFT_BIN: int = _f("U2", 65535)  # 65535 = no soft bin
    X_COORD: int = _f("I2", -32768)  # -32768 = no wafer coordinate (packaged parts)
    Y_COORD: int = _f("I2", -32768)
    TEST_T: int | None = _f("U4")
    PART_ID: str | None = _f("Cn")
    PART_TXT: str | None = _f("Cn")
    PART_FIX: bytes | None = _f("Bn")


@dataclass
class Tsr(Record):
    REC_TYP: ClassVar[int] = 10
    REC_SUB: ClassVar[int] = 30
    HEAD_NUM: int = _f("U1", HEAD_ALL)
    SITE_NUM: int = _f("U1", 0)
    TEST_TYP: str = _f("C1", "P")
    TEST_NUM: int = _f("U4", 0)
    EXEC_CNT: int = _f("U4", 0)
    FAIL_CNT: int = _f("U4", 0)
    ALRM_CNT: int = _f("U4", 0)
    TEST_NAM: str | None = _f("Cn")
    SEQ_NAME: str | None = _f("Cn")
    TEST_LBL: str | None = _f("Cn")
    OPT_FLAG: int | None = _f("B1")
    TEST_TIM: float | None = _f("R4")
    TEST_MIN: float | None = _f("R4")
    TEST_MAX: float | None = _f("R4")
    TST_SUMS: float | None = _f("R4")
    TST_SQRS: float | None = _f("R4")


@dataclass
class Hbr(Record):
    REC_TYP: ClassVar[int] = 1
    REC_SUB: ClassVar[int] = 40
    HEAD_NUM: int = _f("U1", HEAD_ALL)
    SITE_NUM: int = _f("U1", 0)
    HBIN_NUM: int = _f("U2", 0)
    HBIN_CNT: int = _f("U4", 0)
    HBIN_PF: str = _f("C1", " ")
    HBIN_NAM: str | None = _f("Cn")


@dataclass
class Sbr(Record):
    REC_TYP: ClassVar[int] = 1
    REC_SUB: ClassVar[int] = 50
    HEAD_NUM: int = _f("U1", HEAD_ALL)
    SITE_NUM: int = _f("U1", 0)
    SBIN_NUM: int = _f("U2", 0)
    SBIN_CNT: int = _f("U4", 0)
    SBIN_PF: str = _f("C1", " ")
    SBIN_NAM: str | None = _f("Cn")


@dataclass
class Pcr(Record):
    REC_TYP: ClassVar[int] = 1
    REC_SUB: ClassVar[int] = 30
    HEAD_NUM: int = _f("U1", HEAD_ALL)
    SITE_NUM: int = _f("U1", 0)
    PART_CNT: int = _f("U4", 0)
    RTST_CNT: int = _f("U4", 4294967295)  # 4294967295 = missing
    ABRT_CNT: int = _f("U4", 4294967295)
    GOOD_CNT: int = _f("U4", 4294967295)
    FUNC_CNT: int = _f("U4", 4294967295)


@dataclass
class Mrr(Record):
    REC_TYP: ClassVar[int] = 1
    REC_SUB: ClassVar[int] = 20
    FINISH_T: int = _f("U4", 0)
    DISP_COD: str = _f("C1", " ")
    USR_DESC: str | None = _f("Cn")
    EXC_DESC: str | None = _f("Cn")

"""STDF V4 encoder: field bytes, record header, and every record read back by pystdf.

Outside checks: byte layouts are from the STDF V4 specification, from memory (summarised in
docs/stdf.md, "Encoding"), and IEEE 754; whole records are read back with pystdf, the
independent reader.
"""

from __future__ import annotations

import io
import struct

import numpy as np
import pytest

from station.datalog.stdf_records import (
    Dtr,
    Far,
    Hbr,
    Mir,
    Mrr,
    Pcr,
    Pir,
    Prr,
    Ptr,
    Sbr,
    Tsr,
    encode_field,
    encode_record,
    to_ascii,
)
from tests.support.stdf_helpers import StdfRecord


def _parse(data: bytes) -> list[StdfRecord]:
    from pystdf.IO import Parser  # the independent reader

    records: list[StdfRecord] = []

    class Collect:
        def after_send(self, source: object, item: tuple) -> None:
            rec_type, values = item
            records.append(StdfRecord(type(rec_type).__name__,
                                      dict(zip(rec_type.fieldNames, values, strict=True))))

    parser = Parser(inp=io.BytesIO(data))
    parser.addSink(Collect())
    parser.parse()
    return records


def test_record_header_is_length_type_subtype_little_endian() -> None:
    # STDF V4 record header (from memory; docs/stdf.md "Encoding"): REC_LEN U2 (body length),
    # REC_TYP U1, REC_SUB U1.
    data = encode_record(15, 10, [("U4", 0x01020304), ("Cn", "ab")])
    assert data[:4] == bytes([7, 0, 15, 10])
    assert data[4:] == bytes([4, 3, 2, 1, 2]) + b"ab"


@pytest.mark.parametrize(("code", "value", "expected"), [
    ("U1", 200, b"\xc8"), ("U2", 0x1234, b"\x34\x12"), ("U4", 4294967295, b"\xff" * 4),
    ("I1", -1, b"\xff"), ("I2", -32768, b"\x00\x80"), ("I4", -2, b"\xfe\xff\xff\xff"),
    ("B1", 0x81, b"\x81"), ("C1", "P", b"P"),
    # IEEE 754: 1.0 is 0x3F800000 (single) and 0x3FF0000000000000 (double).
    ("R4", 1.0, b"\x00\x00\x80\x3f"), ("R8", 1.0, b"\x00" * 6 + b"\xf0\x3f"),
    ("R4", float("inf"), b"\x00\x00\x80\x7f"),
    ("Bn", b"\x01\x02", b"\x02\x01\x02"), ("Cn", "", b"\x00"),
])
def test_field_bytes(code: str, value: object, expected: bytes) -> None:
    assert encode_field(code, value) == expected


def test_cn_is_cut_to_255_bytes_and_spelled_in_ascii() -> None:
    long = encode_field("Cn", "x" * 300)
    assert long[0] == 255 and long[1:] == b"x" * 255
    # Non-ASCII text is spelled in ASCII (STDF text is ASCII, from memory; pystdf decodes it as
    # such).
    assert to_ascii("±5 µV, 10 kΩ, 25 °C, café, 日") == "+-5 uV, 10 kOhm, 25 degC, cafe, ?"
    wide = encode_field("Cn", "µ" * 300)
    assert wide[0] == 255 and wide[1:] == b"u" * 255


@pytest.mark.parametrize(("code", "value"), [("U1", 256), ("U2", -1), ("I1", 128),
                                             ("R4", 1e39), ("U4", 2**32)])
def test_out_of_range_value_is_a_clear_error(code: str, value: object) -> None:
    with pytest.raises(ValueError, match=code):
        encode_field(code, value)


def test_trailing_unset_fields_are_omitted_and_inner_ones_written_as_missing() -> None:
    short = Ptr(TEST_NUM=7, RESULT=1.0).encode()
    assert struct.unpack("<H", short[:2])[0] == 4 + 1 + 1 + 1 + 1 + 4  # up to RESULT
    with_units = Ptr(TEST_NUM=7, RESULT=1.0, UNITS="V").encode()
    # TEST_TXT, ALARM_ID (Cn "") + OPT_FLAG B1 + 3 x I1 + 2 x R4, then UNITS
    assert len(with_units) - len(short) == 1 + 1 + 1 + 3 + 8 + 2


def test_every_record_reads_back_with_pystdf() -> None:
    records = [
        Far(),
        Mir(SETUP_T=1796061600, START_T=1796061601, MODE_COD="D", LOT_ID="L1", PART_TYP="PX",
            NODE_NAM="n", TSTR_TYP="t", JOB_NAM="j.yaml", JOB_REV="abc", USER_TXT="u",
            SPEC_NAM="s.yaml", SPEC_VER="def", SUPR_NAM="last field"),
        Dtr(TEXT_DAT="instrument dmm1: X,Y,Z"),
        Pir(HEAD_NUM=1, SITE_NUM=3),
        Ptr(TEST_NUM=2001, HEAD_NUM=1, SITE_NUM=3, TEST_FLG=0x80, PARM_FLG=0xC8, RESULT=2.5e-4,
            TEST_TXT="Vos", ALARM_ID="", OPT_FLAG=0x0E, RES_SCAL=6, LLM_SCAL=6, HLM_SCAL=6,
            LO_LIMIT=-1e-4, HI_LIMIT=1e-4, UNITS="V"),
        Prr(HEAD_NUM=1, SITE_NUM=3, PART_FLG=0x09, NUM_TEST=1, HARD_BIN=5, SOFT_BIN=12,
            TEST_T=850, PART_ID="0042", PART_TXT="failed"),
        Tsr(HEAD_NUM=255, SITE_NUM=255, TEST_NUM=2001, EXEC_CNT=3, FAIL_CNT=1, TEST_NAM="Vos",
            SEQ_NAME="seq", TEST_LBL="vos", OPT_FLAG=0x04, TEST_TIM=0.0, TEST_MIN=-1.0,
            TEST_MAX=2.0, TST_SUMS=1.0, TST_SQRS=5.0),
        Hbr(HEAD_NUM=1, SITE_NUM=3, HBIN_NUM=5, HBIN_CNT=9, HBIN_PF="F", HBIN_NAM="Reject"),
        Sbr(HEAD_NUM=255, SITE_NUM=255, SBIN_NUM=12, SBIN_CNT=4, SBIN_PF="F", SBIN_NAM="Vos"),
        Pcr(HEAD_NUM=255, SITE_NUM=255, PART_CNT=10, RTST_CNT=1, ABRT_CNT=2, GOOD_CNT=7),
        Mrr(FINISH_T=1796061670, DISP_COD=" ", USR_DESC="", EXC_DESC="x"),
    ]
    read = _parse(b"".join(r.encode() for r in records))
    assert [r.name for r in read] == [type(r).__name__ for r in records]
    for written, back in zip(records, read, strict=True):
        for name, value in back.fields.items():
            sent = getattr(written, name)
            if sent is None:
                continue  # unset: checked below
            if isinstance(sent, float):
                assert value == np.float32(sent) or value == sent, (back.name, name)
            else:
                assert value == sent, (back.name, name)
    mir = read[1].fields
    assert mir["SBLOT_ID"] == "" and mir["BURN_TIM"] == 65535  # inner unset: missing values
    ptr = read[4].fields
    assert ptr["C_RESFMT"] is None and ptr["HI_SPEC"] is None  # trailing unset: omitted
    assert read[-2].fields["FUNC_CNT"] == 4294967295

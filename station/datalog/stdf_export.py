"""Convert a CSV datalog folder (docs/datalog-format.md) into one binary STDF V4 file.

Choices the datalog leaves open, made here once:
- MIR.MODE_COD is 'D' (development/debug) for a dry run against the simulated bench and
  'P' (production) for any other mode: a dry run tests the program, not parts.
- An over-range result (`inf`) keeps RESULT = +/-inf (an R4 holds it) with TEST_FLG bit 1
  "RESULT not valid": the DMM gave no number at all. Bit 2 "unreliable" would claim a
  measured but doubtful number, which an overload is not.
- The first PTR of a TEST_NUM carries its limits, units and scaling. A later PTR whose low
  (high) limit equals the first one's sets OPT_FLAG bit 4 (5), "use the first PTR's"; one
  whose limit differs (a part decided by another grade) carries its own.
- PARM_FLG bits 6/7 ("equal to limit passes") are always set: our limits are inclusive.
- Summary records for the whole lot use HEAD_NUM 255 and SITE_NUM 255 (the site is ignored
  there; 255 keeps it apart from real sites 1-4 for readers that group by head and site).
- Full hashes, file sources and every instrument's *IDN? string go into DTR records right
  after the MIR, where a MIR field has no room for them.
- TSR statistics (min, max, sums) cover finite results only; TEST_TIM is not known.
- LO_LIMIT/HI_LIMIT are the acceptance limits the station judged with. On a row screened by
  PAT (PAT_LO/PAT_HI in results.csv, format 2) that is the tighter of the grade's limit and
  the PAT window on each side, so a PAT-screened part's PTRs carry their own limits.
  Where the limit table
  of the lot (its copy limits.yaml) is guard-banded, the specification limits go into the
  PTR's LO_SPEC/HI_SPEC (OPT_FLAG bits 2/3 cleared); elsewhere bits 2/3 say "no spec limit".
"""

from __future__ import annotations

import math
from collections import Counter, defaultdict
from collections.abc import Iterator
from dataclasses import dataclass
from pathlib import Path
from typing import Any

from station.datalog.folder import (
    PART_COLUMNS,
    PARTS_CSV,
    RESULT_COLUMNS,
    RESULTS_CSV,
    DatalogError,
    atomic_target,
    format_version,
    match_results_to_parts,
    read_lot_header,
    read_rows,
)
from station.datalog.stdf_records import (
    HEAD_ALL,
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
)

__all__ = ["Datalog", "DatalogError", "match_results", "read_datalog", "stdf_bytes", "write_stdf"]

SITE_ALL = 255  # SITE_NUM written with HEAD_NUM 255 (see the module notes)

# Display scale per unit (power of ten): offsets are uV, currents uA, slopes uV/V.
UNIT_SCALE: dict[str, int] = {"V": 6, "A": 6, "V/V": 6, "dB": 0}

# PTR TEST_FLG / PARM_FLG / OPT_FLAG and PRR PART_FLG bits (STDF V4, "Flag bits").
TEST_FLG_NOT_VALID = 0x02
TEST_FLG_NO_PASS_FAIL = 0x40
TEST_FLG_FAILED = 0x80
PARM_FLG_ABOVE_HIGH = 0x08
PARM_FLG_BELOW_LOW = 0x10
PARM_FLG_EQUAL_PASSES = 0x40 | 0x80
OPT_FLAG_RESERVED = 0x02
OPT_FLAG_NO_SPEC_LIMITS = 0x04 | 0x08
OPT_FLAG_LO_FROM_FIRST = 0x10
OPT_FLAG_HI_FROM_FIRST = 0x20
OPT_FLAG_NO_LO_LIMIT = 0x40
OPT_FLAG_NO_HI_LIMIT = 0x80
PART_FLG_RETEST = 0x01
PART_FLG_ABNORMAL_END = 0x04
PART_FLG_FAILED = 0x08
PART_FLG_NO_PASS_FAIL = 0x10
# TSR OPT_FLAG (from memory of the V4 spec): bit 0 TEST_MIN, 1 TEST_MAX, 2 TEST_TIM,
# 4 TST_SUMS, 5 TST_SQRS invalid.
TSR_TIM_INVALID = 0x04
TSR_STATS_INVALID = 0x01 | 0x02 | 0x10 | 0x20


@dataclass
class Datalog:
    """The three files of a datalog folder the export needs, as read (CSV cells as text)."""

    folder: Path
    lot: dict[str, Any]
    results: list[dict[str, str]]
    parts: list[dict[str, str]]


# --- reading -------------------------------------------------------------------------------

def read_datalog(datalog_dir: Path) -> Datalog:
    """Read lot.json, results.csv and parts.csv; every row is checked against the format,
    so a bad cell is refused with file, line and column (station/datalog/folder.py)."""
    folder = Path(datalog_dir)
    lot = read_lot_header(folder)
    version = format_version(lot)
    results, _ = read_rows(folder / RESULTS_CSV, version=version)
    parts, _ = read_rows(folder / PARTS_CSV, version=version)
    return Datalog(folder, lot, [dict(zip(RESULT_COLUMNS, r, strict=True)) for r in results],
                   [dict(zip(PART_COLUMNS, p, strict=True)) for p in parts])


def _number(text: str) -> float | None:
    """A CSV number cell: None when empty; 'inf' and '-inf' are over-range."""
    text = text.strip()
    return None if text == "" else float(text)


def _tighter(limit: float | None, pat: float | None, pick: Any) -> float | None:
    """The acceptance limit with a PAT window's side (None: that side has none)."""
    return pat if limit is None else limit if pat is None else pick(limit, pat)


def _int(row: dict[str, str], column: str, where: str) -> int:
    try:
        return int(float(row[column]))
    except (TypeError, ValueError):
        raise DatalogError(f"{column} {row.get(column)!r} is not a number", path=where) from None


def _is_fault(part: dict[str, str]) -> bool:
    return part["PASS"].strip() == ""


def match_results(log: Datalog) -> list[list[dict[str, str]]]:
    """The result rows of each part, in parts.csv order (the matching rule is
    station/datalog/folder.py's); a result row of no part is refused, naming its line."""
    parts, results = log.parts, log.results
    owner = match_results_to_parts(
        [r["PART_ID"] for r in results], [int(r["SITE_NUM"]) for r in results],
        [int(r["TEST_NUM"]) for r in results], [p["PART_ID"] for p in parts],
        [int(p["SITE_NUM"]) for p in parts], [not _is_fault(p) for p in parts])
    matched: list[list[dict[str, str]]] = [[] for _ in parts]
    for index, (row, part) in enumerate(zip(results, owner, strict=True)):
        if part < 0:
            raise DatalogError(f"PART_ID: the rows of part {row['PART_ID']!r} site {row['SITE_NUM']} belong "
                               "to no tested part in parts.csv", path=log.folder / RESULTS_CSV, line=index + 2)
        matched[int(part)].append(row)
    return matched


# --- flags ---------------------------------------------------------------------------------

def ptr_flags(result: float, lo: float | None, hi: float | None, passed: str) -> tuple[int, int]:
    """(TEST_FLG, PARM_FLG) of one result; `passed` is the PASS cell ('1', '0' or '')."""
    test_flg = 0
    if not math.isfinite(result):
        test_flg |= TEST_FLG_NOT_VALID
    if passed == "0":
        test_flg |= TEST_FLG_FAILED
    elif passed == "":
        test_flg |= TEST_FLG_NO_PASS_FAIL
    parm_flg = PARM_FLG_EQUAL_PASSES
    if passed == "0":
        if hi is not None and result > hi:
            parm_flg |= PARM_FLG_ABOVE_HIGH
        if lo is not None and result < lo:
            parm_flg |= PARM_FLG_BELOW_LOW
    return test_flg, parm_flg


def part_flags(part: dict[str, str]) -> int:
    """PRR PART_FLG of one parts.csv row."""
    flags = PART_FLG_RETEST if part["RETEST"].strip() == "1" else 0
    passed = part["PASS"].strip()
    if passed == "0":
        flags |= PART_FLG_FAILED
    elif passed == "":
        flags |= PART_FLG_ABNORMAL_END | PART_FLG_NO_PASS_FAIL  # tester fault
    return flags


# --- records -------------------------------------------------------------------------------

def _hash_prefix(entry: Any) -> str:
    return str(entry.get("sha256", ""))[:16] if isinstance(entry, dict) else ""


def _file_name(entry: Any) -> str:
    if not isinstance(entry, dict):
        return ""
    return Path(str(entry.get("source") or entry.get("file") or "")).name


def _lot_records(lot: dict[str, Any]) -> Iterator[bytes]:
    start = int(float(lot.get("start_t") or 0))
    software = lot.get("software") or {}
    hashes = " ".join(f"{name}={lot[name]['sha256']}" for name in ("sequence", "limits", "bench")
                      if isinstance(lot.get(name), dict) and lot[name].get("sha256"))
    yield Far().encode()
    yield Mir(
        SETUP_T=start, START_T=start, STAT_NUM=1,
        MODE_COD="D" if lot.get("mode") == "dry-run" else "P",
        LOT_ID=str(lot.get("lot_id", "")), PART_TYP=str(lot.get("product", "")),
        NODE_NAM=str(lot.get("station", "")),
        TSTR_TYP=Path(_file_name(lot.get("bench"))).stem or "bench",
        JOB_NAM=_file_name(lot.get("sequence")), JOB_REV=_hash_prefix(lot.get("sequence")),
        SBLOT_ID="", OPER_NAM=str(lot.get("operator", "")),
        EXEC_TYP=str(software.get("name", "")), EXEC_VER=str(software.get("version", "")),
        TEST_COD=str(lot.get("mode", "")), TST_TEMP="", USER_TXT=hashes,
        AUX_FILE="", PKG_TYP="", FAMLY_ID="", DATE_COD="", FACIL_ID="", FLOOR_ID="",
        PROC_ID="", OPER_FRQ="",
        SPEC_NAM=_file_name(lot.get("limits")), SPEC_VER=_hash_prefix(lot.get("limits")),
        FLOW_ID="", SETUP_ID=_hash_prefix(lot.get("bench")),
    ).encode()
    for text in _header_texts(lot):
        yield Dtr(TEXT_DAT=text).encode()


def _header_texts(lot: dict[str, Any]) -> Iterator[str]:
    yield f"datalog format {lot.get('format', '')}"
    for name in ("sequence", "limits", "bench"):
        entry = lot.get(name)
        if isinstance(entry, dict):
            yield f"{name} sha256 {entry.get('sha256', '')} source {entry.get('source', '')}"
    for role, idn in sorted((lot.get("instruments") or {}).items()):
        yield f"instrument {role}: {idn}"


@dataclass
class _Limits:
    lo: float | None
    hi: float | None


SpecLimits = dict[tuple[str, str, str], tuple[float | None, float | None]]


def _spec_limits(log: Datalog) -> SpecLimits:
    """(grade, param, region) -> spec limits of a guard-banded table; empty when the lot's
    table has none (or cannot be read: the export then says nothing of spec limits)."""
    from station.config.files import ConfigError
    from station.config.limit_tables import load_limit_table

    path = log.folder / str((log.lot.get("limits") or {}).get("file", "limits.yaml"))
    try:
        table = load_limit_table(path)
    except (ConfigError, OSError):
        return {}
    return {(grade.name, lim.param, lim.region or ""): (lim.spec_low, lim.spec_high)
            for grade in table.grades for lim in grade.limits
            if lim.spec_low is not None or lim.spec_high is not None}


def _ptr(row: dict[str, str], first: dict[int, _Limits], where: str, specs: SpecLimits | None = None) -> Ptr:
    number = _int(row, "TEST_NUM", where)
    try:
        result = float(row["RESULT"])
        lo, hi = _number(row["LO_LIMIT"]), _number(row["HI_LIMIT"])
        lo = _tighter(lo, _number(row.get("PAT_LO", "")), max)
        hi = _tighter(hi, _number(row.get("PAT_HI", "")), min)
    except ValueError:
        raise DatalogError("RESULT or a limit is not a number", path=where) from None
    passed = row["PASS"].strip()
    test_flg, parm_flg = ptr_flags(result, lo, hi, passed)
    opt = OPT_FLAG_RESERVED | OPT_FLAG_NO_SPEC_LIMITS
    opt |= OPT_FLAG_NO_LO_LIMIT if lo is None else 0
    opt |= OPT_FLAG_NO_HI_LIMIT if hi is None else 0
    lo_out, hi_out = lo, hi
    if number in first:
        if lo == first[number].lo:
            opt, lo_out = opt | OPT_FLAG_LO_FROM_FIRST, None
        if hi == first[number].hi:
            opt, hi_out = opt | OPT_FLAG_HI_FROM_FIRST, None
    else:
        first[number] = _Limits(lo, hi)
    units = row["UNITS"].strip()
    scale = UNIT_SCALE.get(units, 0)
    spec = (specs or {}).get((row["GRADE"].strip(), row["PARAM"].strip(), row["REGION"].strip()))
    spec_fields: dict[str, Any] = {}
    if spec is not None:
        opt &= ~OPT_FLAG_NO_SPEC_LIMITS
        opt |= 0x04 if spec[0] is None else 0
        opt |= 0x08 if spec[1] is None else 0
        spec_fields = {"C_RESFMT": "", "C_LLMFMT": "", "C_HLMFMT": "",
                       "LO_SPEC": 0.0 if spec[0] is None else spec[0],
                       "HI_SPEC": 0.0 if spec[1] is None else spec[1]}
    return Ptr(
        TEST_NUM=number, HEAD_NUM=_int(row, "HEAD_NUM", where),
        SITE_NUM=_int(row, "SITE_NUM", where), TEST_FLG=test_flg, PARM_FLG=parm_flg,
        RESULT=result, TEST_TXT=row["TEST_TXT"], ALARM_ID="", OPT_FLAG=opt,
        RES_SCAL=scale, LLM_SCAL=scale, HLM_SCAL=scale,
        LO_LIMIT=0.0 if lo_out is None else lo_out, HI_LIMIT=0.0 if hi_out is None else hi_out,
        UNITS=units, **spec_fields,
    )


def _part_text(part: dict[str, str]) -> str:
    if _is_fault(part):
        return f"tester fault: {part.get('FAULT', '')}".strip()
    if part["PASS"].strip() == "1":
        return f"grade {part.get('GRADE', '')}".strip()
    fail_test = part.get("FAIL_TEST", "").strip()
    return f"failed test {fail_test}" if fail_test else "failed"


def _part_records(log: Datalog) -> Iterator[bytes]:
    first: dict[int, _Limits] = {}
    specs = _spec_limits(log)
    for index, (part, rows) in enumerate(zip(log.parts, match_results(log), strict=True)):
        where = f"{PARTS_CSV}:{index + 2}"
        head, site = _int(part, "HEAD_NUM", where), _int(part, "SITE_NUM", where)
        yield Pir(HEAD_NUM=head, SITE_NUM=site).encode()
        for row in rows:
            yield _ptr(row, first, f"results.csv part {part['PART_ID']!r}", specs).encode()
        soft = part["SOFT_BIN"].strip()
        test_t = _number(part["TEST_T"])
        yield Prr(
            HEAD_NUM=head, SITE_NUM=site, PART_FLG=part_flags(part), NUM_TEST=len(rows),
            HARD_BIN=_int(part, "HARD_BIN", where),
            SOFT_BIN=_int(part, "SOFT_BIN", where) if soft else 65535,
            TEST_T=0 if test_t is None else round(test_t),
            PART_ID=part["PART_ID"], PART_TXT=_part_text(part),
        ).encode()


def _tsr(head: int, site: int, number: int, rows: list[dict[str, str]], name: str,
         label: str, sequence: str) -> Tsr:
    values = [float(r["RESULT"]) for r in rows]
    finite = [v for v in values if math.isfinite(v)]
    opt = TSR_TIM_INVALID | (0 if finite else TSR_STATS_INVALID)
    return Tsr(
        HEAD_NUM=head, SITE_NUM=site, TEST_TYP="P", TEST_NUM=number, EXEC_CNT=len(rows),
        FAIL_CNT=sum(r["PASS"].strip() == "0" for r in rows), ALRM_CNT=0,
        TEST_NAM=name, SEQ_NAME=sequence, TEST_LBL=label, OPT_FLAG=opt, TEST_TIM=0.0,
        TEST_MIN=min(finite, default=0.0), TEST_MAX=max(finite, default=0.0),
        TST_SUMS=math.fsum(finite), TST_SQRS=math.fsum(v * v for v in finite),
    )


def _test_records(log: Datalog) -> Iterator[bytes]:
    sequence = _file_name(log.lot.get("sequence"))
    names: dict[int, tuple[str, str]] = {}  # TEST_NUM -> (TEST_NAM, TEST_LBL), execution order
    for test in log.lot.get("tests") or []:
        label = " ".join(x for x in (test.get("param", ""), test.get("region", "")) if x)
        names.setdefault(int(test["test_num"]), (str(test.get("test_txt", "")), label))
    by_site: dict[tuple[int, int], dict[int, list[dict[str, str]]]] = defaultdict(
        lambda: defaultdict(list))
    for row in log.results:
        where = "results.csv"
        number = _int(row, "TEST_NUM", where)
        label = " ".join(x for x in (row.get("PARAM", ""), row.get("REGION", "")) if x)
        names.setdefault(number, (row["TEST_TXT"], label))
        by_site[(_int(row, "HEAD_NUM", where), _int(row, "SITE_NUM", where))][number].append(row)
    for (head, site), tests in sorted(by_site.items()):
        for number in (n for n in names if n in tests):
            yield _tsr(head, site, number, tests[number], *names[number], sequence).encode()
    for number, (name, label) in names.items():
        rows = [r for tests in by_site.values() for r in tests.get(number, [])]
        yield _tsr(HEAD_ALL, SITE_ALL, number, rows, name, label, sequence).encode()


def _bin_table(lot: dict[str, Any], key: str) -> dict[int, tuple[str, str]]:
    """Bin number -> (P/F, name) from lot.json."""
    table: dict[int, tuple[str, str]] = {}
    for number, info in (lot.get(key) or {}).items():
        pf = {True: "P", False: "F"}.get(info.get("pass"), " ")
        table[int(number)] = (pf, str(info.get("name", "")))
    return table


def _site_groups(log: Datalog) -> list[tuple[int, int, list[dict[str, str]]]]:
    """(HEAD_NUM, SITE_NUM, parts) for each site in use, then the whole lot."""
    by_site: dict[tuple[int, int], list[dict[str, str]]] = defaultdict(list)
    for part in log.parts:
        by_site[(_int(part, "HEAD_NUM", "parts.csv"), _int(part, "SITE_NUM", "parts.csv"))].append(part)
    groups = [(head, site, parts) for (head, site), parts in sorted(by_site.items())]
    return groups + [(HEAD_ALL, SITE_ALL, log.parts)]


def _bin_records(log: Datalog) -> Iterator[bytes]:
    groups = _site_groups(log)
    for column, key, record in (("HARD_BIN", "hard_bins", Hbr), ("SOFT_BIN", "soft_bins", Sbr)):
        table = _bin_table(log.lot, key)
        for head, site, parts in groups:
            counts = Counter(int(p[column]) for p in parts if p[column].strip())
            numbers = sorted(set(counts) | (set(table) if head == HEAD_ALL else set()))
            for number in numbers:
                pf, name = table.get(number, (" ", ""))
                prefix = "HBIN" if record is Hbr else "SBIN"
                yield record(HEAD_NUM=head, SITE_NUM=site, **{  # type: ignore[arg-type]
                    f"{prefix}_NUM": number, f"{prefix}_CNT": counts[number],
                    f"{prefix}_PF": pf, f"{prefix}_NAM": name}).encode()
    for head, site, parts in groups:
        yield Pcr(
            HEAD_NUM=head, SITE_NUM=site, PART_CNT=len(parts),
            RTST_CNT=sum(p["RETEST"].strip() == "1" for p in parts),
            ABRT_CNT=sum(_is_fault(p) for p in parts),
            GOOD_CNT=sum(p["PASS"].strip() == "1" for p in parts),
        ).encode()


def _finish_record(log: Datalog) -> bytes:
    end = log.lot.get("end_t")
    if end is None:  # lot did not end: last part end, else lot start
        ends = [t for t in (_number(p.get("END_T", "") or "") for p in log.parts) if t is not None]
        end = max(ends, default=float(log.lot.get("start_t") or 0))
    complete = bool(log.lot.get("complete", False))
    return Mrr(FINISH_T=int(float(end)), DISP_COD=" ", USR_DESC="",
               EXC_DESC="" if complete else "lot not complete").encode()


def stdf_bytes(log: Datalog) -> bytes:
    """The whole STDF file of a datalog, in record order FAR ... MRR."""
    chunks = [*_lot_records(log.lot), *_part_records(log), *_test_records(log),
              *_bin_records(log), _finish_record(log)]
    return b"".join(chunks)


def write_stdf(datalog_dir: Path, out_path: Path | None = None) -> Path:
    """Write the datalog in `datalog_dir` as STDF V4 to `out_path` (default lot.stdf there)."""
    log = read_datalog(Path(datalog_dir))
    try:
        data = stdf_bytes(log)
    except ValueError as exc:
        raise DatalogError(f"cannot be written as STDF: {exc}", path=log.folder) from None
    target = Path(out_path) if out_path is not None else log.folder / "lot.stdf"
    with atomic_target(target) as temp:  # a reader never sees half a file
        temp.write_bytes(data)
    return target

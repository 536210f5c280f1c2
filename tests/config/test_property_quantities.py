"""Property: whatever quantity text is written into a bench, sequence or limit table, the loader
either refuses it as one line naming the file, line and key, or loads finite values of the
right size. Values: numbers in every spelling (non-finite, huge, tiny), units of every
dimension (dimensionless ones included), and keys written twice. Tool: hypothesis.

The normal suite runs a few hundred examples per loader; `HYPOTHESIS_PROFILE=fuzz` (see
tests/conftest.py) runs 10,000.
"""

from __future__ import annotations

import math

from hypothesis import given
from hypothesis import strategies as st

from station.config.bench_config import parse_bench_config
from station.config.files import ConfigError
from station.config.limit_tables import parse_limit_table
from station.config.sequence import parse_sequence
from station.demo import DEMO_LIMITS, DEMO_SEQUENCE
from tests.config.test_bad_values import BENCH

SEQUENCE = DEMO_SEQUENCE.read_text(encoding="utf-8")
LIMITS = DEMO_LIMITS.read_text(encoding="utf-8")

NUMBERS = st.one_of(
    st.sampled_from(["nan", "-nan", "inf", "-inf", ".inf", ".nan", "1e400", "-1e400", "1e-400",
                     "0", "-0", "1e30", "1e-30", "9**9", "1_0", "0x10", "1e", "."]),
    st.floats(allow_nan=True, allow_infinity=True).map(repr),
    st.integers(-10**30, 10**30).map(str),
)
UNITS = st.sampled_from(["", "V", "mV", "uV", "kV", "A", "mA", "uA", "pA", "s", "ms", "us", "Ohm",
                         "kOhm", "Hz", "dB", "V/V", "uV/V", "percent", "%", "ppm", "radian",
                         "dimensionless", "degC", "m", "furlong", "VV", "V V"])
QUANTITY = st.builds(lambda n, u, sep: f"{n}{sep}{u}", NUMBERS, UNITS, st.sampled_from(["", " ", "  "]))

BENCH_KEYS = ["max_rail: 12 V", "current_compliance: 20 mA", "rf: 100 kOhm,", "rs: 100 Ohm,"]
SEQUENCE_KEYS = ["span: 10 V", "compliance: 20 mA", "max: 500 ms", "tail: 40 ms", "nplc: 1"]
LIMIT_KEYS = ["high: 50 uV,", "low: 120 dB,", "open_below: 50 uA", "short_above: 5 mA"]


def _substitute(base: str, key: str, value: str) -> str:
    name, _, rest = key.partition(":")
    comma = "," if rest.endswith(",") else ""
    return base.replace(key, f'{name}: "{value}"{comma}', 1)


def _loaded_or_refused(loader, text: str) -> object | None:
    try:
        return loader(text, "f.yaml")
    except ConfigError as exc:
        message = str(exc)
        assert message.startswith("f.yaml:") and "\n" not in message, message
        return None


def _all_floats(value: object, seen: set[int] | None = None) -> list[float]:
    """Every float reachable in a loaded record (dataclasses, tuples, dicts)."""
    seen = seen if seen is not None else set()
    if id(value) in seen:
        return []
    seen.add(id(value))
    if isinstance(value, float):
        return [value]
    if isinstance(value, dict):
        return [f for item in value.values() for f in _all_floats(item, seen)]
    if isinstance(value, list | tuple | set | frozenset):
        return [f for item in value for f in _all_floats(item, seen)]
    fields = getattr(value, "__dataclass_fields__", None)
    if fields:
        return [f for name in fields for f in _all_floats(getattr(value, name), seen)]
    return []


def _check(loader, base: str, key: str, value: str, duplicate: bool) -> None:
    text = _substitute(base, key, value)
    if duplicate:       # a top-level key written again at the end
        first_key = next(line for line in text.splitlines() if line[:1].isalpha() and ":" in line)
        text += "\n" + first_key + "\n"
    loaded = _loaded_or_refused(loader, text)
    if loaded is not None:
        assert not duplicate
        # Never NaN, and nothing finite beyond what the bench can produce (an open limit may
        # be held as infinity by the loader itself).
        floats = _all_floats(loaded)
        assert not any(math.isnan(f) for f in floats), value
        assert all(abs(f) < 1e13 for f in floats if math.isfinite(f)), value


@given(st.sampled_from(BENCH_KEYS), QUANTITY, st.booleans())
def test_bench_loader_takes_any_quantity_text(key, value, duplicate):
    _check(parse_bench_config, BENCH, key, value, duplicate)


@given(st.sampled_from(SEQUENCE_KEYS), QUANTITY, st.booleans())
def test_sequence_loader_takes_any_quantity_text(key, value, duplicate):
    _check(parse_sequence, SEQUENCE, key, value, duplicate)


@given(st.sampled_from(LIMIT_KEYS), QUANTITY, st.booleans())
def test_limit_loader_takes_any_quantity_text(key, value, duplicate):
    _check(parse_limit_table, LIMITS, key, value, duplicate)

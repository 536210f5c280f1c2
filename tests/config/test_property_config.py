"""Property: the config loaders (sequence, limit table, bench config) turn any text and any
mapping into a valid result or a ConfigError, never another exception.

Inputs: arbitrary text; arbitrary YAML-able data; and the shipped example files with one
value (anywhere in the tree) replaced by arbitrary data, which reaches the deep checks.
Tool: hypothesis (https://hypothesis.readthedocs.io).
"""

from __future__ import annotations

from typing import Any

import yaml
from hypothesis import HealthCheck, given, settings
from hypothesis import strategies as st

from station.config.bench_config import parse_bench_config
from station.config.files import ConfigError
from station.config.limit_tables import parse_limit_table
from station.config.sequence import parse_sequence
from station.demo import DEMO_LIMITS, DEMO_SEQUENCE

EXAMPLE_BENCH = """\
station: example
instruments:
  supply: {resource: "TCPIP0::192.0.2.10::5025::SOCKET", driver: scpi-dual-supply}
  force: {resource: "TCPIP0::192.0.2.11::5025::SOCKET", driver: scpi-force-source}
  dmm:
    - {resource: "TCPIP0::192.0.2.12::5025::SOCKET", driver: scpi-dmm, timeout: 5 s}
  switch: {resource: "TCPIP0::192.0.2.13::5025::SOCKET", driver: scpi-fixture-switch}
fixture: {rf: 100 kOhm, rs: 100 Ohm, sites: 1, line_frequency: 50 Hz}
safety: {max_rail: 12 V, current_compliance: 20 mA}
"""

LOADERS = {
    "sequence": (parse_sequence, DEMO_SEQUENCE.read_text(encoding="utf-8")),
    "limits": (parse_limit_table, DEMO_LIMITS.read_text(encoding="utf-8")),
    "bench": (parse_bench_config, EXAMPLE_BENCH),
}

scalars = st.one_of(st.none(), st.booleans(), st.integers(), st.floats(allow_nan=True),
                    st.text(max_size=12),
                    st.sampled_from(["10 V", "-3 uV", "V+ - 1.3 V", "mid", "50 Hz", "1e400", "nan V",
                                     "20 mA", "A", "low", "step", "0", "-1", "1 kOhm"]))
data = st.recursive(scalars, lambda inner: st.one_of(
    st.lists(inner, max_size=4), st.dictionaries(st.text(max_size=8), inner, max_size=4)), max_leaves=12)


def _accepts_or_refuses(loader, text: str) -> None:
    try:
        loader(text, "<property>")
    except ConfigError as exc:
        assert str(exc).startswith("<property>")     # names the file
        assert "\n" not in str(exc) and "\r" not in str(exc)   # one line


def _paths(node: Any, prefix: tuple = ()) -> list[tuple]:
    found = [prefix] if prefix else []
    if isinstance(node, dict):
        for key, value in node.items():
            found += _paths(value, (*prefix, key))
    elif isinstance(node, list):
        for index, value in enumerate(node):
            found += _paths(value, (*prefix, index))
    return found


def _replace(node: Any, path: tuple, value: Any) -> Any:
    if not path:
        return value
    head, rest = path[0], path[1:]
    copy = dict(node) if isinstance(node, dict) else list(node)
    copy[head] = _replace(copy[head], rest, value)
    return copy


FAST = settings(max_examples=120, deadline=None, suppress_health_check=[HealthCheck.too_slow])


@FAST
@given(name=st.sampled_from(sorted(LOADERS)), text=st.text(max_size=200))
def test_any_text(name, text):
    _accepts_or_refuses(LOADERS[name][0], text)


@FAST
@given(name=st.sampled_from(sorted(LOADERS)), value=data)
def test_any_mapping(name, value):
    _accepts_or_refuses(LOADERS[name][0], yaml.safe_dump(value))


@FAST
@given(name=st.sampled_from(sorted(LOADERS)), choice=st.integers(min_value=0), value=data)
def test_example_with_one_value_replaced(name, choice, value):
    loader, text = LOADERS[name]
    document = yaml.safe_load(text)
    paths = _paths(document)
    mutated = _replace(document, paths[choice % len(paths)], value)
    _accepts_or_refuses(loader, yaml.safe_dump(mutated))


def test_the_examples_themselves_load():
    for loader, text in LOADERS.values():
        loader(text, "<example>")

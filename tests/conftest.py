"""Shared test settings: hypothesis profiles and the repository root.

Helpers that several test folders use live in tests/support/ (imported as tests.support.*).
"""

from __future__ import annotations

import os
from pathlib import Path

import pytest
from hypothesis import HealthCheck, settings

REPO_ROOT = Path(__file__).resolve().parents[1]

# "ci" (the default) keeps property tests within the suite's time; "fuzz" is the long run:
# HYPOTHESIS_PROFILE=fuzz python -m pytest tests/config -k property
settings.register_profile("ci", deadline=None, suppress_health_check=[HealthCheck.too_slow])
settings.register_profile("fuzz", deadline=None, max_examples=10_000,
                          suppress_health_check=[HealthCheck.too_slow])
settings.load_profile(os.environ.get("HYPOTHESIS_PROFILE", "ci"))


@pytest.fixture(scope="session")
def repo_root() -> Path:
    return REPO_ROOT


def pytest_addoption(parser: pytest.Parser) -> None:
    # The driver conformance tests (tests/conformance) run against the simulated bench; given
    # a bench config they also run against that bench's real instruments.
    parser.addoption("--bench", default=None, metavar="BENCH.yaml",
                     help="run the driver conformance tests against this bench's instruments too")


def pytest_configure(config: pytest.Config) -> None:
    config.addinivalue_line("markers", "conformance: a driver conformance test (tests/conformance)")
    config.addinivalue_line("markers", "real_bench: runs against real instruments; needs --bench")

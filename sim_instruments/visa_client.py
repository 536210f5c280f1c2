"""Open a running SimBench's instruments through pyvisa-py, as a station would (for tests)."""

from __future__ import annotations

import pyvisa
from pyvisa.resources import MessageBasedResource

from sim_instruments.bench import SimBench


def open_resource(resource: str, timeout_ms: int = 3000,
                  manager: pyvisa.ResourceManager | None = None) -> MessageBasedResource:
    rm = manager or pyvisa.ResourceManager("@py")
    return rm.open_resource(resource, read_termination="\n", write_termination="\n",
                            timeout=timeout_ms)  # type: ignore[return-value]


def open_all(bench: SimBench, timeout_ms: int = 3000) -> dict[str, MessageBasedResource]:
    rm = pyvisa.ResourceManager("@py")
    return {role: open_resource(res, timeout_ms, rm) for role, res in bench.resources.items()}


def close_all(resources: dict[str, MessageBasedResource]) -> None:
    for resource in resources.values():
        try:
            resource.close()
        except Exception:  # noqa: BLE001 - a dropped connection may already be gone
            pass

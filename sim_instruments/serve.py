"""Run the simulated bench from the command line until Ctrl-C or SIGTERM."""

from __future__ import annotations

import json
import signal
import threading
from collections.abc import Callable
from pathlib import Path

from sim_instruments.bench import TRANSPORTS, SimBench, SimSettings

FAULT_KINDS = ("latency", "timeout", "drop", "garbage", "error", "stuck", "offset", "readback",
               "noreset", "hot")


def parse_fault_option(text: str) -> tuple[str, str, float]:
    """'dmm1:latency=0.05' -> ('dmm1', 'latency', 0.05). ValueError says how to write it."""
    try:
        role, rest = text.split(":", 1)
        kind, value = rest.split("=", 1)
        number = float(value)
    except ValueError:
        raise ValueError(f"cannot read fault {text!r}: write ROLE:KIND=VALUE, "
                         "e.g. dmm1:latency=0.05") from None
    kind = kind.strip().lower()
    if kind not in FAULT_KINDS:
        raise ValueError(f"unknown fault kind {kind!r}: use one of {', '.join(FAULT_KINDS)}")
    return role.strip(), kind, number


def apply_transport_options(settings: SimSettings, texts: tuple[str, ...] | list[str]) -> None:
    """'hislip' (every instrument) or 'dmm1=hislip' (one role), applied in order. ValueError
    says how to write it."""
    for text in texts:
        role, _, transport = text.rpartition("=")
        transport = transport.strip().lower()
        if transport not in TRANSPORTS:
            raise ValueError(f"unknown transport {transport!r}: write {' or '.join(TRANSPORTS)}, "
                             "or ROLE=TRANSPORT for one instrument, e.g. dmm1=hislip")
        if role.strip():
            settings.transports[role.strip()] = transport
        else:
            settings.transport = transport
            settings.transports.clear()


def apply_fault(bench: SimBench, role: str, kind: str, value: float) -> None:
    if role not in bench.resources and role not in bench.instruments:
        raise ValueError(f"no instrument {role!r} on this bench: {', '.join(bench.instruments)}")
    faults = bench.faults(role)
    if kind == "latency":
        faults.latency_s = value
    elif kind == "timeout":
        faults.timeout_next = int(value)
    elif kind == "drop":
        faults.drop_after = int(value)
    elif kind == "garbage":
        faults.garbage_next = int(value)
    elif kind == "error":
        faults.push_error(int(value))
    elif kind == "stuck":
        faults.stuck_relay = int(value)
    elif kind == "offset":
        faults.offset_v = value
    elif kind == "readback":
        faults.readback_v = value
    elif kind == "noreset":
        faults.ignore_reset = bool(value)
    else:
        faults.output_stuck_on = bool(value)


def serve_until_interrupted(settings: SimSettings, write_bench: Path | None = None,
                            echo: Callable[[str], None] = print, truth_path: Path | None = None,
                            faults: list[tuple[str, str, float]] | None = None,
                            stop_event: threading.Event | None = None) -> None:
    """Serve the bench, echo 'ROLE RESOURCE' per instrument, stop cleanly on Ctrl-C/SIGTERM
    (or when `stop_event` is set), then write the truth CSV if asked."""
    stop = stop_event or threading.Event()
    previous = None
    if threading.current_thread() is threading.main_thread():
        previous = signal.signal(signal.SIGTERM, lambda *_: stop.set())
    bench = SimBench(settings).start()
    try:
        for role, kind, value in faults or []:
            apply_fault(bench, role, kind, value)
        for role, resource in bench.resources.items():
            echo(f"{role} {resource}")
        if write_bench is not None:
            bench.write_bench_config(write_bench)
        try:
            while not stop.wait(0.2):
                pass
        except KeyboardInterrupt:
            pass
    finally:
        bench.stop()
        if previous is not None:
            signal.signal(signal.SIGTERM, previous)
        if truth_path is not None:
            bench.write_truth(truth_path)
            errors = bench.bench_errors_truth()
            if errors is not None:   # the bench's own errors, beside the parts' truth
                Path(truth_path).with_suffix(".bench.json").write_text(json.dumps(errors, indent=2) + "\n")


if __name__ == "__main__":
    serve_until_interrupted(SimSettings())

"""The simulated bench in a process of its own, as a real bench's instruments are machines of
their own: the station (or the replay script) then shares no interpreter, and no GIL, with the
simulator's server threads.

`station sim serve` has no option for the ideal bench or the command log, so the child is
this module run as `python -m benchmarks.bench_process` (a plain subprocess, so that the
caller's main module is never re-imported): it reads its `SimSettings` from stdin, builds
`SimBench(settings)`, writes back its resources and bench config, serves until told to stop,
then writes back the command log and the truth (pickles over the pipes). The physics is the
same object as in process; only where it runs changes (the model clock is `time.monotonic`,
the log's wall times `time.time`, both system-wide).
"""

from __future__ import annotations

import os
import pickle
import select
import subprocess
import sys
import tempfile
from pathlib import Path
from typing import IO

from sim_instruments.bench import CommandRecord, SimBench, SimSettings

_START_TIMEOUT_S = 60.0
_STOP_TIMEOUT_S = 30.0


def _child() -> None:
    """Child process: serve the bench until the parent says stop (or closes its end)."""
    out = os.fdopen(os.dup(1), "wb")
    os.dup2(2, 1)  # anything printed goes to stderr, never into the pickles
    sys.stdout = sys.stderr
    settings: SimSettings = pickle.load(sys.stdin.buffer)
    try:
        sim = SimBench(settings).start()
    except Exception as exc:  # noqa: BLE001 - reported to the parent, which raises it
        pickle.dump(("error", f"{type(exc).__name__}: {exc}"), out)
        out.flush()
        return
    try:
        pickle.dump(("ready", dict(sim.resources), sim.bench_config_text()), out)
        out.flush()
        try:
            pickle.load(sys.stdin.buffer)  # any message means stop
        except EOFError:
            pass
    finally:
        sim.stop()
    with tempfile.TemporaryDirectory() as temp:
        truth = Path(temp) / "sim_truth.csv"
        sim.write_truth(truth)
        truth_bytes = truth.read_bytes()
    try:
        pickle.dump(("stopped", list(sim.command_log), truth_bytes), out)
        out.flush()
    except (BrokenPipeError, OSError):
        pass


class BenchProcess:
    """`with BenchProcess(settings) as sim:` like `SimBench`; after the block (or `stop()`),
    `command_log` holds what the bench logged and `write_truth(path)` writes its truth."""

    def __init__(self, settings: SimSettings) -> None:
        self.settings = settings
        self.resources: dict[str, str] = {}
        self.command_log: list[CommandRecord] = []
        self._config = ""
        self._truth: bytes | None = None
        self._process: subprocess.Popen | None = None

    def start(self) -> BenchProcess:
        if self._process is not None:
            return self
        process = subprocess.Popen([sys.executable, "-m", "benchmarks.bench_process"],
                                   stdin=subprocess.PIPE, stdout=subprocess.PIPE)
        self._process = process
        try:
            stdin = _pipe(process.stdin)
            pickle.dump(self.settings, stdin)
            stdin.flush()
            message = self._receive(_START_TIMEOUT_S)
        except BaseException:
            self._kill()
            raise
        if message is None or message[0] != "ready":
            self._kill()
            why = "no answer" if message is None else message[1]
            raise RuntimeError(f"simulated bench process failed to start: {why}")
        _, self.resources, self._config = message
        return self

    def _receive(self, timeout_s: float):
        """The child's next message, or None if it sent none in time or ended."""
        if self._process is None:
            return None
        stdout = _pipe(self._process.stdout)
        ready, _, _ = select.select([stdout], [], [], timeout_s)
        if not ready:
            return None
        try:
            return pickle.load(stdout)
        except EOFError:
            return None

    def bench_config_text(self) -> str:
        if not self._config:
            raise RuntimeError("start the bench first: the resources are known once bound")
        return self._config

    def stop(self) -> None:
        process = self._process
        if process is None:
            return
        try:
            stdin = _pipe(process.stdin)
            pickle.dump("stop", stdin)
            stdin.flush()
            message = self._receive(_STOP_TIMEOUT_S)
            if message is not None and message[0] == "stopped":
                _, self.command_log, self._truth = message
        except (BrokenPipeError, OSError):
            pass
        finally:
            self._kill()

    def write_truth(self, path: str | Path) -> None:
        if self._truth is None:
            raise RuntimeError("the truth is known once the bench process has stopped cleanly")
        Path(path).write_bytes(self._truth)

    def _kill(self) -> None:
        """Close the pipes and wait for the child; terminate it only if it does not end."""
        process, self._process = self._process, None
        if process is None:
            return
        for pipe in (process.stdin, process.stdout):
            try:
                if pipe is not None:
                    pipe.close()
            except OSError:
                pass
        try:
            process.wait(_STOP_TIMEOUT_S)
        except subprocess.TimeoutExpired:
            process.terminate()
            process.wait(5.0)

    def __enter__(self) -> BenchProcess:
        return self.start()

    def __exit__(self, *exc: object) -> None:
        self.stop()


if __name__ == "__main__":
    _child()


def _pipe(stream: IO[bytes] | None) -> IO[bytes]:
    """The child's pipe; Popen was given PIPE, so it exists while the child is ours."""
    if stream is None:
        raise RuntimeError("the bench process has no pipe: it was not started with PIPE")
    return stream

"""The benchmark's load watch: other processes' CPU time marks a section, its own does not."""

from __future__ import annotations

import subprocess
import sys
import time

import pytest

from benchmarks.machine import OTHER_CPU_SHARE, LoadWatch, cpu_model

BURN = "import time\nend = time.monotonic() + {s}\nwhile time.monotonic() < end: pass\n"


@pytest.mark.skipif(not sys.platform.startswith("linux"), reason="reads /proc/stat")
def test_a_process_that_is_not_ours_marks_the_section_loaded():
    # `sh -c '... &'` leaves the busy loop to init: it is not our child, so it is other work.
    # The loop keeps one core busy for 1 s of the 1.2 s watched: about 0.8 of a core.
    with LoadWatch("test") as watch:
        subprocess.run(["sh", "-c", f"{sys.executable} -c '{BURN.format(s=1.0)}' &"], check=True)
        time.sleep(1.2)
    assert watch.other_cpu_share is not None
    assert watch.other_cpu_share * watch.cores > 0.5
    assert watch.loaded == (watch.other_cpu_share > OTHER_CPU_SHARE) == watch.figures()["loaded"]


def test_cpu_model_names_something():
    assert cpu_model()

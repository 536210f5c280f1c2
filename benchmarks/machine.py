"""The machine the figures were taken on."""

from __future__ import annotations

import os
import platform
import sys

import numpy
import pandas
import pyvisa


def machine_info() -> dict[str, str | int]:
    return {"cores": os.cpu_count() or 0, "python": sys.version.split()[0], "numpy": numpy.__version__,
            "pandas": pandas.__version__, "pyvisa": pyvisa.__version__,
            "platform": platform.platform(), "processor": platform.machine()}

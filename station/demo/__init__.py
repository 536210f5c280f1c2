"""The demo product's files (invented PX-401): limit table, sequence, example bench config.

In the repository they live in the top-level folders limits/, sequences/ and benches/; an
installed wheel carries them as package data under station/demo/ (see pyproject.toml).
"""

from __future__ import annotations

from importlib import resources
from pathlib import Path

_REPO_ROOT = Path(__file__).resolve().parents[2]


def demo_file(folder: str, name: str) -> Path:
    """Path of a demo file: `folder` is 'limits', 'sequences' or 'benches'."""
    packaged = Path(str(resources.files(__name__))) / folder / name
    if packaged.is_file():
        return packaged
    return _REPO_ROOT / folder / name


DEMO_LIMITS = demo_file("limits", "px401.yaml")
DEMO_SEQUENCE = demo_file("sequences", "px401_screen.yaml")
EXAMPLE_BENCH = demo_file("benches", "example-bench.yaml")
# The second fixture: a difference-amplifier bench with a function generator, its AC CMRR
# sequence and limit table (docs/fixtures.md).
DIFFAMP_BENCH = demo_file("benches", "px401-diffamp-bench.yaml")
AC_SEQUENCE = demo_file("sequences", "px401_ac_cmrr.yaml")
AC_LIMITS = demo_file("limits", "px401_ac.yaml")

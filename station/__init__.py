"""Amplifier screening station: sequencer, measurement math, grading, datalog and review."""

__version__ = "0.1.0"

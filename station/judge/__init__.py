"""Pure functions: readings to figures (measure), figures to verdicts, grades and bins (grading)."""

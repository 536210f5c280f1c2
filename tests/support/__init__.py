"""Helpers shared by the test folders: simulated benches, small datalogs, STDF read-back."""

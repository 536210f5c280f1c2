"""Test kinds: one module per kind of test a sequence can list, and the registry that names them.

A kind says, in one place, which rows it logs (station/config/test_catalog numbers them), how
it runs on the bench (through the `StepScreen` an index gives it) and what it checks before
anything is powered. A new kind is a new module here with a `TestKind` subclass, and one line
in `registry.KINDS`.
"""

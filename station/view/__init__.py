"""The live page of a lot: a snapshot computed from its datalog folder, served to browsers."""

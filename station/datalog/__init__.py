"""The datalog folder: its format, the writer, resume, the manifest, STDF records and export."""

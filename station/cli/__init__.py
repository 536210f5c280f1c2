"""The `station` command: one module per command group; exit codes live in station.errors."""

"""`python -m station.cli` runs the `station` command."""

from station.cli.main import main

main()

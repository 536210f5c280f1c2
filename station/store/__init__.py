"""The fleet store: many stations' datalogs in one PostgreSQL database (docs/fleet-store.md)."""

"""A network of stations: the central PostgreSQL store, the ingest service and store-and-forward sync (docs/network.md)."""

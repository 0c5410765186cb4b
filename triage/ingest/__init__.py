"""ingest layer."""

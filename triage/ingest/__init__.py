"""Ingest layer: capture files and removal logs -> validated rows, bad lines -> quarantine."""

from triage.ingest.run import IngestReport, ingest_paths

__all__ = ["IngestReport", "ingest_paths"]

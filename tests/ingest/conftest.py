from tests.ingest.lines import write_capture  # noqa: F401  (fixture)

"""formats layer."""

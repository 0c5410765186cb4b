"""survival layer."""

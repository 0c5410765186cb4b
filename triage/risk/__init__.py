"""risk layer."""

"""report layer."""

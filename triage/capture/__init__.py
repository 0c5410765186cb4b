"""capture layer."""

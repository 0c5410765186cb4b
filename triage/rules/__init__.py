"""rules layer."""

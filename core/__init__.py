"""Numbers only."""

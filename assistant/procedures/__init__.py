"""procedures."""

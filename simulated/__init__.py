"""simulated package."""

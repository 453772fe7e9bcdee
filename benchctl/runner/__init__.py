"""runner package."""

"""scpi package."""

"""procedures package."""

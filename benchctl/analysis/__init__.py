"""analysis package."""

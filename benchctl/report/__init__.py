"""report package."""

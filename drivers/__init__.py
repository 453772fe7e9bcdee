"""drivers package."""

"""Command-line interface (no Qt imported here)."""

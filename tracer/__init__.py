"""Bench I-V tracer: the application package."""

__version__ = "0.1.0"

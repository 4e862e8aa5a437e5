"""tracer package."""

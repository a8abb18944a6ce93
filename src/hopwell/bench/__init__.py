"""Benchmarks: modules that print a table (``python -m hopwell.bench.<name>``)."""

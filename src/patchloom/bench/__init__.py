"""Benchmarks against a plain square-resize baseline, and their corpora."""

"""Benchmarks: scripts that print tables; they are not tests."""

"""Hostile input, fuzzing, security and outage tests."""

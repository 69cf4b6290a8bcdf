"""Tests of the dashboard."""

"""Reliability under real processes: concurrent writers, SIGKILL mid-write, leader failover."""

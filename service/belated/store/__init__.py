"""The store: tables, sessions, ingest, rollups and dirty buckets."""

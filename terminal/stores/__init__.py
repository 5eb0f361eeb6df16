"""Stores that keep the core's records: in memory, or in SQLite on disk."""

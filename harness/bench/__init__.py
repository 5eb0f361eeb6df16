"""Benchmarks: figures printed side by side, never asserted."""

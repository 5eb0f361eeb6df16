"""Durability: what must survive a power cut, as records the core asks a store to keep."""

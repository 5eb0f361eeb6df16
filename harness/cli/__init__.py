"""The ionotrail command."""

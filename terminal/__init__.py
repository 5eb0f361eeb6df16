"""ionotrail's reference remote-terminal protocol stack (sans-I/O core)."""

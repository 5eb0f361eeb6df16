"""The energy environment of a terminal's site: the sun, the sky, the weather."""

"""Stations the harness puts on the other end of a port: the simulated air, the master."""

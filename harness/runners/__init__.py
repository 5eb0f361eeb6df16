"""Runners: the virtual-time loop and the simulation of a link over days."""

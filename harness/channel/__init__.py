"""The meteor-burst channel model: scenario, geometry, trail physics, noise,
frame outcomes and the capacity bound."""

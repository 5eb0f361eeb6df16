"""Test machinery: hypothesis strategies and stateful machines, fuzz, faulty channels, endpoint pairs."""

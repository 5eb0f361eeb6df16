"""The fragment sender, the reassembler, range sets and duplicate windows: exactly-once delivery."""

"""Migration scripts, one per schema revision."""

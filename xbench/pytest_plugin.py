"""pytest plugin for xbench (being written)."""

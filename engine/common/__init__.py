"""Small shared helpers: atomic file writes and the on-disk cache."""

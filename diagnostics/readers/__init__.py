"""Readers: measurement files -> SI data (placeholder, filled below)."""

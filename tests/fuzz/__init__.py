"""Fuzz tests: hostile inputs through the whole path (read, derive, check, both emitters)."""

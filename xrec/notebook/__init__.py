"""Notebook widgets and rich display."""

"""Turning a table of historical events into a verified bundle."""

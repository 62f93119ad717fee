"""Displays that only read: figures, reports, the live view and the terminal watch."""

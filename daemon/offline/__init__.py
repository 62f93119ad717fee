"""Reprocessing recorded runs after the fact, on this machine or on a cluster."""

"""Analyses over sweeps: compare, training-run trend, token views, the live view."""

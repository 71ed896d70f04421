"""Figures and movies (matplotlib, Agg backend)."""

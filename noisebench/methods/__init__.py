"""Gain-method and Y-factor noise-figure methods."""

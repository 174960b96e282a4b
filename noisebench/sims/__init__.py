"""Simulated bench (installed as noisebench.sims)."""

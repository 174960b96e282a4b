"""SCPI instrument drivers (installed as noisebench.drivers)."""

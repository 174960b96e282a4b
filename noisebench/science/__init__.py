"""Measurement science: physics, filters, detection, estimator, ENR, methods, uncertainty,
limits."""

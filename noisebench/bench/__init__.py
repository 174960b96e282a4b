"""The bench: abstract instrument interfaces, acquisition models and the address registry."""

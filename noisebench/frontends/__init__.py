"""Front ends: the command line, station mode, the demo and the pytest plugin."""

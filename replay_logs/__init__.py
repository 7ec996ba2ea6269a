"""The demo venue's recordings and their truth file (package data, read with importlib.resources)."""

"""The systemd units a board and a collector run under (package data, read with importlib.resources)."""

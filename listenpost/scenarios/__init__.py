"""The scenario files the simulator and the demo read (package data)."""
